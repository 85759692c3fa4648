package serve_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"runtime"
	"slices"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
)

// BenchmarkWebhookByStore runs one load through the real webhook, store and
// engine on the embedded store (the baseline, measured in the same run),
// on PostgreSQL with one replica, and on PostgreSQL with three replicas in
// this one process sharing the database (each with its own connection
// pool, listener, engine and leases; the senders spread the notifications
// over them as a load balancer would). Run it with
//
//	.ci/postgres go test -run XXX -bench WebhookByStore -benchtime 1x ./api/serve
//
// (DEADSPACE_TEST_POSTGRES_URL names the server; without one the
// PostgreSQL cases skip). The log line of each PostgreSQL case states the
// server's version and whether it syncs to disk: .ci/postgres's throwaway
// cluster runs with fsync off, unlike a production server.
//
// The load: 100 patients, each with an hour of minute readings of five
// kinds, then 16 senders post 4,000 one-reading notifications with no
// settle delay; every 50th is a blood gas, timed from the webhook
// receiving it to its derived transaction reaching a minimal FHIR endpoint
// in the same process. Reported: notifications accepted a second, the
// senders' p99, blood gas to transaction p50 and p99, the share of the
// machine's cores this process used during the load (the database server's
// own processes are not in it), and the database's commits per
// notification.
func BenchmarkWebhookByStore(b *testing.B) {
	load := storeBenchLoad{patients: 100, history: 60, senders: 16, notes: 4000, gasEvery: 50}
	b.Run("store=embedded/replicas=1", func(b *testing.B) { benchByStore(b, load, "", 1) })
	b.Run("store=postgres/replicas=1", func(b *testing.B) { benchByStore(b, load, pgtest.NewSchema(b), 1) })
	b.Run("store=postgres/replicas=3", func(b *testing.B) { benchByStore(b, load, pgtest.NewSchema(b), 3) })
}

type storeBenchLoad struct {
	patients, history, senders, notes, gasEvery int
}

func benchByStore(b *testing.B, load storeBenchLoad, dbURL string, replicas int) {
	if dbURL != "" {
		b.Log(postgresConditions(b, dbURL))
	}
	b.Logf("GOMAXPROCS %d on %d cores; %d patients with %d min of history, %d senders, %d notifications, a blood gas every %d",
		runtime.GOMAXPROCS(0), runtime.NumCPU(), load.patients, load.history, load.senders, load.notes, load.gasEvery)
	for range b.N {
		fake := &sink{arrived: make(map[string]time.Time)}
		srv := httptest.NewServer(fake)
		var svcs []*serve.Service
		var bases []string
		ctx, cancel := context.WithCancel(context.Background())
		var running sync.WaitGroup
		for range replicas {
			cfg := testConfig(srv.URL+"/fhir", b.TempDir())
			cfg.Store = dbURL
			svc, err := serve.New(cfg, "bench", slog.New(slog.DiscardHandler))
			if err != nil {
				b.Fatal(err)
			}
			running.Go(func() { _ = svc.Run(ctx) })
			svcs = append(svcs, svc)
			bases = append(bases, "http://"+svc.Addr())
		}
		now := time.Now().UTC().Truncate(time.Minute)
		for p := range load.patients {
			subject := fmt.Sprintf("Patient/bench-%d", p)
			batch := []json.RawMessage{json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"bench-%d","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1960-01-01"}`, p)),
				benchObs(subject, fmt.Sprintf("h-%d", p), "8302-2", "cm", 175, now.Add(-7*time.Hour))}
			for m := load.history; m > 0; m-- {
				at := now.Add(-time.Duration(m) * time.Minute)
				for k, c := range []struct {
					code, unit string
					v          float64
				}{{"19891-1", "mm[Hg]", 36}, {"76222-9", "mL", 480}, {"19840-8", "/min", 16}, {"76008-2", "L/min", 7.7}, {"60825-7", "mL/min", 210}} {
					batch = append(batch, benchObs(subject, fmt.Sprintf("r-%d-%d-%d", p, m, k), c.code, c.unit, c.v, at))
				}
			}
			if _, err := svcs[p%replicas].Engine().Ingest(ctx, "bench", batch); err != nil {
				b.Fatal(err)
			}
		}
		for _, svc := range svcs {
			waitQuiet(b, svc)
		}
		commitsBefore := dbCommits(b, dbURL)

		type gasSent struct {
			id string
			at time.Time
		}
		var (
			sentMu     sync.Mutex
			gases      []gasSent
			clientLat  []time.Duration
			n          atomic.Int64
			failures   atomic.Int64
			httpClient = &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: load.senders}}
		)
		cpuBefore := cpuTime()
		b.ResetTimer()
		start := time.Now()
		var wg sync.WaitGroup
		for range load.senders {
			wg.Go(func() {
				for {
					k := int(n.Add(1))
					if k > load.notes {
						return
					}
					subject := fmt.Sprintf("Patient/bench-%d", k%load.patients)
					isGas := k%load.gasEvery == 0
					id := fmt.Sprintf("n-%d", k)
					res := benchObs(subject, id, "19891-1", "mm[Hg]", 36, now.Add(time.Duration(k)*time.Millisecond))
					if isGas {
						id = fmt.Sprintf("g-%d", k)
						res = benchObs(subject, id, "2019-8", "mm[Hg]", 42, benchGasTime(now, k, load.patients, load.history))
					}
					body := notification("Subscription/bench", k, []json.RawMessage{res})
					t0 := time.Now()
					req, _ := http.NewRequest(http.MethodPost, bases[k%replicas]+"/notify", bytes.NewReader(body))
					req.Header.Set("Authorization", "Bearer "+secret)
					req.Header.Set("Content-Type", "application/fhir+json")
					resp, err := httpClient.Do(req)
					if err != nil {
						failures.Add(1)
						continue
					}
					_, _ = io.Copy(io.Discard, resp.Body)
					resp.Body.Close()
					if resp.StatusCode != http.StatusOK {
						failures.Add(1)
						continue
					}
					sentMu.Lock()
					clientLat = append(clientLat, time.Since(t0))
					if isGas {
						gases = append(gases, gasSent{id, t0})
					}
					sentMu.Unlock()
				}
			})
		}
		wg.Wait()
		elapsed := time.Since(start)
		b.StopTimer()

		deadline := time.Now().Add(3 * time.Minute)
		var lat []time.Duration
		for {
			lat = lat[:0]
			fake.mu.Lock()
			for _, g := range gases {
				if at, ok := fake.arrived[g.id]; ok {
					lat = append(lat, at.Sub(g.at))
				}
			}
			fake.mu.Unlock()
			if len(lat) == len(gases) || time.Now().After(deadline) {
				break
			}
			time.Sleep(20 * time.Millisecond)
		}
		cpu := cpuTime() - cpuBefore
		wall := time.Since(start)
		commits := dbCommits(b, dbURL) - commitsBefore
		cancel()
		running.Wait()
		srv.Close()
		if failures.Load() > 0 || len(lat) != len(gases) || len(gases) == 0 {
			b.Fatalf("%d failed notifications; %d of %d blood gases reached the server", failures.Load(), len(lat), len(gases))
		}
		slices.Sort(lat)
		slices.Sort(clientLat)
		b.ReportMetric(float64(load.notes)/elapsed.Seconds(), "notifications/s")
		b.ReportMetric(ms(clientLat[len(clientLat)*99/100]), "client-p99-ms")
		b.ReportMetric(ms(lat[len(lat)/2]), "gas-to-tx-p50-ms")
		b.ReportMetric(ms(lat[len(lat)*99/100]), "gas-to-tx-p99-ms")
		b.ReportMetric(100*cpu.Seconds()/(wall.Seconds()*float64(runtime.NumCPU())), "process-cpu-%")
		if dbURL != "" {
			b.ReportMetric(float64(commits)/float64(load.notes), "db-commits/notification")
		}
	}
}

func ms(d time.Duration) float64 { return float64(d.Microseconds()) / 1000 }

// cpuTime is the user and system time this process has used.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// postgresConditions names the server and its durability settings, which
// decide what a commit costs.
func postgresConditions(b *testing.B, dbURL string) string {
	conn, err := pgx.Connect(context.Background(), dbURL)
	if err != nil {
		b.Fatal(err)
	}
	defer conn.Close(context.Background())
	var version, fsync, syncCommit string
	err = conn.QueryRow(context.Background(), `SELECT current_setting('server_version'), current_setting('fsync'), current_setting('synchronous_commit')`).
		Scan(&version, &fsync, &syncCommit)
	if err != nil {
		b.Fatal(err)
	}
	return fmt.Sprintf("PostgreSQL %s, fsync=%s, synchronous_commit=%s, on this machine over loopback TCP", version, fsync, syncCommit)
}

// dbCommits is the database's count of committed transactions so far
// (0 for the embedded store); the statistics lag by up to half a second.
func dbCommits(b *testing.B, dbURL string) int64 {
	if dbURL == "" {
		return 0
	}
	conn, err := pgx.Connect(context.Background(), dbURL)
	if err != nil {
		b.Fatal(err)
	}
	defer conn.Close(context.Background())
	var n int64
	_, _ = conn.Exec(context.Background(), `SELECT pg_stat_force_next_flush()`)
	if err := conn.QueryRow(context.Background(), `SELECT xact_commit FROM pg_stat_database WHERE datname = current_database()`).Scan(&n); err != nil {
		b.Fatal(err)
	}
	return n
}
