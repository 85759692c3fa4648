package serve_test

import (
	"bufio"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"path"
	"path/filepath"
	"regexp"
	"runtime"
	"runtime/debug"
	"runtime/pprof"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/serve"
)

// sink is a minimal FHIR endpoint for the benchmark: it acknowledges
// transactions and conditional creates at once and records when each
// patient's derived values arrived. The Medplum peer checks correctness;
// this one keeps the server's own cost out of the service's figures.
var (
	gasRef       = regexp.MustCompile(`"Observation/(g-[0-9]+)/_history/`)
	entryRequest = regexp.MustCompile(`"request":\{"method":"[A-Z]+","url":"([A-Za-z]+)`)
)

type sink struct {
	mu      sync.Mutex
	arrived map[string]time.Time // blood gas id → first transaction citing it
	next    atomic.Int64
}

func (s *sink) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	body, _ := io.ReadAll(r.Body)
	w.Header().Set("Content-Type", "application/fhir+json")
	switch {
	case r.Method == http.MethodGet:
		fmt.Fprint(w, `{"resourceType":"Bundle","type":"searchset","total":0}`)
	case r.Method == http.MethodPost && (r.URL.Path == "/fhir" || r.URL.Path == "/fhir/"):
		now := time.Now()
		s.mu.Lock()
		for _, m := range gasRef.FindAllSubmatch(body, -1) {
			if _, ok := s.arrived[string(m[1])]; !ok {
				s.arrived[string(m[1])] = now
			}
		}
		s.mu.Unlock()
		// One answer per entry, of the type its request names. The
		// requests are found by pattern, not by decoding the Bundle: a
		// string value cannot hold an unescaped quote, so the pattern
		// matches requests only, and decoding would put a FHIR server's
		// cost into the service's CPU figure.
		var out []string
		for _, m := range entryRequest.FindAllSubmatch(body, -1) {
			typ := string(m[1])
			id := s.next.Add(1)
			out = append(out, fmt.Sprintf(`{"response":{"status":"201","location":"%s/%d/_history/1"},"resource":{"resourceType":"%s","id":"%d","meta":{"versionId":"1"}}}`, typ, id, typ, id))
		}
		fmt.Fprintf(w, `{"resourceType":"Bundle","type":"transaction-response","entry":[%s]}`, strings.Join(out, ","))
	default:
		// A create of one resource (the software Device, or a Provenance
		// sent after its Observations): answered as the type posted, or
		// the writer would take it for a refusal and retry it for ever.
		id := s.next.Add(1)
		w.WriteHeader(http.StatusCreated)
		fmt.Fprintf(w, `{"resourceType":"%s","id":"%d","meta":{"versionId":"1"}}`, path.Base(r.URL.Path), id)
	}
}

// BenchmarkWebhookToOutbox measures sustained notifications per second
// through the webhook into the store, and for blood gases among them the
// time from the webhook receiving the notification to the derived
// transaction reaching the FHIR server, on the embedded store with fsync.
// Each patient carries 6 hours of minute-by-minute readings of five kinds.
//
// The goal case is issue 9's: 500 patients (each with an hour of history),
// 16 senders, one reading per notification, no settle delay; its goals are
// at least 5,000 notifications accepted a second, client p99 under 50 ms,
// and blood gas to transaction p99 under 250 ms.
//
// DEADSPACE_BENCH_CPUPROFILE=file writes a CPU profile of the timed load
// only (after the history is loaded).
func BenchmarkWebhookToOutbox(b *testing.B) {
	for _, c := range []webhookBench{
		{name: "goal/patients=500/senders=16/settle=0s", patients: 500, senders: 16, history: 60, notes: 10000},
		// The same with the Kubernetes manifests' collector setting (GOGC
		// 400 beside GOMEMLIMIT), to show what the deployment gains.
		{name: "goal/patients=500/senders=16/settle=0s/gogc=400", patients: 500, senders: 16, history: 60, notes: 10000, gcPercent: 400},
		// The goal's load evaluating every reading at once (--device-pace
		// 0), as the service did before the pace.
		{name: "goal/patients=500/senders=16/settle=0s/device-pace=0", patients: 500, senders: 16, history: 60, notes: 10000, devicePace: -1},
		// The goal's load with one blood gas in 5,000 notifications instead
		// of one in 50: beside the goal case in the same run, it shows what
		// the blood gases' evaluations, writes and acknowledgements cost.
		{name: "few-gases/patients=500/senders=16/settle=0s/gas-every=5000", patients: 500, senders: 16, history: 60, notes: 10000, gasEvery: 5000},
		{name: "patients=20/senders=32/settle=0s", patients: 20, senders: 32, history: 6 * 60, notes: 6000},
		{name: "patients=20/senders=32/settle=1s", patients: 20, senders: 32, history: 6 * 60, notes: 6000, settle: time.Second},
	} {
		b.Run(c.name, func(b *testing.B) { benchWebhook(b, c) })
	}
}

type webhookBench struct {
	name                              string
	patients, senders, history, notes int
	settle                            time.Duration
	// gcPercent, when set, is the collector's GOGC for the run.
	gcPercent int
	// devicePace is the service's --device-pace: its default when zero,
	// none when negative.
	devicePace time.Duration
	// gasEvery: every gasEvery-th notification is a blood gas (50 when
	// zero).
	gasEvery int
}

func benchWebhook(b *testing.B, c webhookBench) {
	gasEvery := cmp.Or(c.gasEvery, 50)
	patients, notes, senders, readingsPer, settle := c.patients, c.notes, c.senders, c.history, c.settle
	if c.gcPercent != 0 {
		defer debug.SetGCPercent(debug.SetGCPercent(c.gcPercent))
	}
	for i := 0; i < b.N; i++ {
		dir := b.TempDir()
		fake := &sink{arrived: make(map[string]time.Time)}
		srv := httptest.NewServer(fake)
		cfg := testConfig(srv.URL+"/fhir", dir)
		cfg.Settle = settle
		cfg.DevicePace = max(0, cmp.Or(c.devicePace, engine.DefaultDevicePace))
		svc, err := serve.New(cfg, "bench", slog.New(slog.DiscardHandler))
		if err != nil {
			b.Fatal(err)
		}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- svc.Run(ctx) }()
		now := time.Now().UTC().Truncate(time.Minute)

		// Six hours of readings for every patient, loaded through the engine.
		var heapBefore runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&heapBefore)
		for p := 0; p < patients; p++ {
			subject := fmt.Sprintf("Patient/bench-%d", p)
			batch := []json.RawMessage{json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"bench-%d","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1960-01-01"}`, p)),
				benchObs(subject, fmt.Sprintf("h-%d", p), "8302-2", "cm", 175, now.Add(-7*time.Hour))}
			for m := readingsPer; m > 0; m-- {
				at := now.Add(-time.Duration(m) * time.Minute)
				for k, c := range []struct {
					code, unit string
					v          float64
				}{{"19891-1", "mm[Hg]", 36}, {"76222-9", "mL", 480}, {"19840-8", "/min", 16}, {"76008-2", "L/min", 7.7}, {"60825-7", "mL/min", 210}} {
					batch = append(batch, benchObs(subject, fmt.Sprintf("r-%d-%d-%d", p, m, k), c.code, c.unit, c.v, at))
				}
			}
			if _, err := svc.Engine().Ingest(ctx, "bench", batch); err != nil {
				b.Fatal(err)
			}
		}
		waitQuiet(b, svc)
		var heapAfter runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&heapAfter)
		diskBytes := dirSize(dir)
		probe := probeDisk(b, dir)
		cpuProbe := probeCPU()

		// The load: senders POST notifications of one resource each, mostly a
		// new end-tidal reading, every gasEvery-th a blood gas.
		type gasSent struct {
			subject string
			at      time.Time
		}
		var sentMu sync.Mutex
		var gases []gasSent
		var n atomic.Int64
		var failures atomic.Int64
		var clientMu sync.Mutex
		var clientLat []time.Duration
		// The notifications are built before the clock starts: building
		// them is the FHIR server's work, not the service's.
		type note struct {
			request []byte // the whole HTTP request
			subject string // the blood gas's id, for a blood gas
		}
		built := make([]note, notes+1)
		for k := 1; k <= notes; k++ {
			p := k % patients
			subject := fmt.Sprintf("Patient/bench-%d", p)
			var res json.RawMessage
			if k%gasEvery == 0 {
				res = benchObs(subject, fmt.Sprintf("g-%d", k), "2019-8", "mm[Hg]", 42, benchGasTime(now, k, patients, readingsPer))
				built[k].subject = fmt.Sprintf("g-%d", k)
			} else {
				res = benchObs(subject, fmt.Sprintf("n-%d", k), "19891-1", "mm[Hg]", 36, now.Add(time.Duration(k)*time.Millisecond))
			}
			built[k].request = notifyRequest(svc.Addr(), notification("Subscription/bench", k, []json.RawMessage{res}))
		}
		b.ResetTimer()
		writerBefore := storeWriter(b, svc)
		cpuBefore := processCPU()
		writtenBefore := processWriteBytes()
		// -cpuprofile would mostly show the loading of the history; this
		// profiles the timed load alone.
		profiling := false
		if f := os.Getenv("DEADSPACE_BENCH_CPUPROFILE"); f != "" {
			pf, err := os.Create(f)
			if err != nil {
				b.Fatal(err)
			}
			defer pf.Close()
			if err := pprof.StartCPUProfile(pf); err != nil {
				b.Fatal(err)
			}
			profiling = true
		}
		start := time.Now()
		var wg sync.WaitGroup
		for s := 0; s < senders; s++ {
			wg.Add(1)
			go func() {
				defer wg.Done()
				var conn *rawSender
				defer func() { conn.close() }()
				for {
					k := n.Add(1)
					if k > int64(notes) {
						return
					}
					subject := built[k].subject
					t0 := time.Now()
					if conn == nil {
						var err error
						if conn, err = dialSender(svc.Addr()); err != nil {
							failures.Add(1)
							continue
						}
					}
					status, err := conn.post(built[k].request)
					if err != nil {
						conn.close()
						conn = nil
					}
					if err != nil || status != http.StatusOK {
						failures.Add(1)
						continue
					}
					clientMu.Lock()
					clientLat = append(clientLat, time.Since(t0))
					clientMu.Unlock()
					if subject != "" {
						sentMu.Lock()
						gases = append(gases, gasSent{subject, t0})
						sentMu.Unlock()
					}
				}
			}()
		}
		wg.Wait()
		elapsed := time.Since(start)
		cpuUsed := processCPU() - cpuBefore
		writerAfter := storeWriter(b, svc)
		written := processWriteBytes() - writtenBefore
		if profiling {
			pprof.StopCPUProfile()
		}
		b.StopTimer()

		// Wait for every blood gas's transaction, then compute latencies.
		deadline := time.Now().Add(2 * time.Minute)
		var lat []time.Duration
		for {
			lat = lat[:0]
			fake.mu.Lock()
			for _, g := range gases {
				if at, ok := fake.arrived[g.subject]; ok {
					lat = append(lat, at.Sub(g.at))
				}
			}
			fake.mu.Unlock()
			if len(lat) == len(gases) || time.Now().After(deadline) {
				break
			}
			time.Sleep(50 * time.Millisecond)
		}
		cancel()
		<-done
		srv.Close()
		if failures.Load() > 0 || len(lat) != len(gases) {
			b.Fatalf("%d failed notifications; %d of %d blood gases reached the server", failures.Load(), len(lat), len(gases))
		}
		slices.Sort(lat)
		b.ReportMetric(float64(notes)/elapsed.Seconds(), "notifications/s")
		// CPU time of the whole process (senders, webhook, store, engine,
		// writer and the sink alike) per notification: on a machine shared
		// with other work it moves far less than the rate does.
		b.ReportMetric(float64(cpuUsed.Microseconds())/float64(notes), "cpu-µs/notification")
		// Bytes the process sent to the disk, per notification: unlike the
		// rate, it hardly moves with the machine, and on a virtual disk
		// the syncs a webhook answer waits for grow with it. Where the
		// kernel does not count it, the figure is left out.
		if written >= 0 {
			b.ReportMetric(float64(written)/float64(notes), "disk-write-B/notification")
		}
		// The embedded store's writer, which every answer waits for: the
		// share of the load's time it was busy, and the notifications a
		// transaction carried (the metrics operators read).
		b.ReportMetric((writerAfter.busy-writerBefore.busy)/elapsed.Seconds(), "store-busy")
		b.ReportMetric(float64(notes)/(writerAfter.transactions-writerBefore.transactions), "notifications/store-transaction")
		// Patient evaluations begun during the load, per notification: one
		// per reading without the device pace.
		b.ReportMetric((writerAfter.evaluations-writerBefore.evaluations)/float64(notes), "evaluations/notification")
		b.ReportMetric(float64(probe.Microseconds()), "disk-probe-µs")
		b.ReportMetric(float64(cpuProbe.Microseconds()), "cpu-probe-µs")
		b.ReportMetric(float64(lat[len(lat)/2].Microseconds())/1000, "p50-ms")
		b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds())/1000, "p99-ms")
		slices.Sort(clientLat)
		b.ReportMetric(float64(clientLat[len(clientLat)*99/100].Microseconds())/1000, "client-p99-ms")
		b.ReportMetric(float64(int64(heapAfter.HeapAlloc)-int64(heapBefore.HeapAlloc))/float64(patients), "heap-B/patient")
		b.ReportMetric(float64(diskBytes)/float64(patients), "disk-B/patient")
	}
}

// benchGasTime is the sample time of the benchmark's k-th notification,
// a blood gas, for patients patients with history minutes of readings:
// somewhere in the history, and a second apart from the patient's other
// blood gases, since two of one patient at one instant with one value are
// one sample reported twice (derive's same-sample rule), which a load of
// separate blood gases must not be.
func benchGasTime(now time.Time, k, patients, history int) time.Time {
	return now.Add(-time.Duration(k%(history-20)+10)*time.Minute - time.Duration(k/patients)*time.Second)
}

// notifyRequest is an HTTP/1.1 request of a notification to the webhook,
// with the headers a FHIR server sends.
func notifyRequest(addr string, body []byte) []byte {
	head := fmt.Sprintf("POST /notify HTTP/1.1\r\nHost: %s\r\nAuthorization: Bearer %s\r\n"+
		"Content-Type: application/fhir+json\r\nContent-Length: %d\r\n\r\n", addr, secret, len(body))
	return append([]byte(head), body...)
}

// rawSender is one sender's kept-alive connection to the webhook. It
// writes requests built before the clock starts and reads each answer
// with net/http's parser, without the client's connection pool and its
// two goroutines per connection: the benchmark's senders share the
// service's two cores, and a FHIR server's sending is not the service's
// cost (with http.Client the senders took about a tenth of the CPU).
type rawSender struct {
	conn net.Conn
	r    *bufio.Reader
}

func dialSender(addr string) (*rawSender, error) {
	conn, err := net.Dial("tcp", addr)
	if err != nil {
		return nil, err
	}
	return &rawSender{conn: conn, r: bufio.NewReader(conn)}, nil
}

// post sends one request and returns the answer's status once its body
// is read.
func (s *rawSender) post(request []byte) (int, error) {
	if _, err := s.conn.Write(request); err != nil {
		return 0, err
	}
	resp, err := http.ReadResponse(s.r, nil)
	if err != nil {
		return 0, err
	}
	_, err = io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	if err == nil && resp.Close {
		err = errors.New("the service closed the connection")
	}
	return resp.StatusCode, err
}

func (s *rawSender) close() {
	if s != nil {
		s.conn.Close()
	}
}

// writerCounts are the service's deadspace_store_* counters and its
// evaluations.
type writerCounts struct{ busy, transactions, evaluations float64 }

func storeWriter(b *testing.B, svc *serve.Service) writerCounts {
	b.Helper()
	families, err := svc.Metrics.Registry().Gather()
	if err != nil {
		b.Fatal(err)
	}
	var w writerCounts
	for _, f := range families {
		switch f.GetName() {
		case "deadspace_store_busy_seconds_total":
			w.busy = f.GetMetric()[0].GetCounter().GetValue()
		case "deadspace_store_transactions_total":
			w.transactions = f.GetMetric()[0].GetCounter().GetValue()
		case "deadspace_evaluations_total":
			for _, m := range f.GetMetric() {
				w.evaluations += m.GetCounter().GetValue()
			}
		}
	}
	if w.transactions == 0 {
		b.Fatal("the service reports no store transactions")
	}
	return w
}

func benchObs(subject, id, code, unit string, v float64, at time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, at.Format(time.RFC3339), code, subject, at.Format(time.RFC3339), v, unit, unit))
}

// probeCPU times a fixed piece of work of the kind the service does for a
// notification (decoding a notification Bundle with encoding/json and
// hashing it), a thousand times, on one goroutine (the median of 15). The
// same binary's CPU per notification moves with this machine's speed from
// hour to hour by nearly twice; reported beside the rate, it lets
// runs be compared at like speeds.
func probeCPU() time.Duration {
	body := notification("Subscription/probe", 1, []json.RawMessage{
		benchObs("Patient/probe", "probe", "19891-1", "mm[Hg]", 36, time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC))})
	var took []time.Duration
	for range 15 {
		t0 := time.Now()
		for range 1000 {
			var v map[string]any
			if json.Unmarshal(body, &v) != nil {
				panic("the probe's notification does not decode")
			}
			sha256.Sum256(body)
		}
		took = append(took, time.Since(t0))
	}
	slices.Sort(took)
	return took[len(took)/2]
}

// probeDisk times, in dir, what a commit of the embedded store asks of the
// disk when it is busy: 24 pages written at scattered places, a sync, one
// page, a sync (the median of 60). On a virtual disk this cost changes
// from hour to hour by as much as twice, and the notification rate with
// it, so each run reports it beside the rate: runs compare only at like
// probe figures.
func probeDisk(b *testing.B, dir string) time.Duration {
	b.Helper()
	f, err := os.Create(filepath.Join(dir, "probe"))
	if err != nil {
		b.Fatal(err)
	}
	defer os.Remove(f.Name())
	defer f.Close()
	const pages, span = 24, 4096
	page := make([]byte, 4096)
	if _, err := f.Write(make([]byte, span*4096)); err != nil {
		b.Fatal(err)
	}
	if err := f.Sync(); err != nil {
		b.Fatal(err)
	}
	var took []time.Duration
	for i := range 60 {
		t0 := time.Now()
		for p := range pages {
			if _, err := f.WriteAt(page, int64((i*pages+p)*1031%span)*4096); err != nil {
				b.Fatal(err)
			}
		}
		if err := f.Sync(); err != nil {
			b.Fatal(err)
		}
		if _, err := f.WriteAt(page, 0); err != nil {
			b.Fatal(err)
		}
		if err := f.Sync(); err != nil {
			b.Fatal(err)
		}
		took = append(took, time.Since(t0))
	}
	slices.Sort(took)
	return took[len(took)/2]
}

// processWriteBytes is how many bytes this process has caused to be sent
// to storage (Linux's /proc/self/io write_bytes), -1 where it is not
// counted.
func processWriteBytes() int64 {
	b, err := os.ReadFile("/proc/self/io")
	if err != nil {
		return -1
	}
	for _, line := range strings.Split(string(b), "\n") {
		if v, ok := strings.CutPrefix(line, "write_bytes: "); ok {
			n, err := strconv.ParseInt(v, 10, 64)
			if err != nil {
				return -1
			}
			return n
		}
	}
	return -1
}

// processCPU is the user and system CPU time this process has used.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

func waitQuiet(b *testing.B, svc *serve.Service) {
	deadline := time.Now().Add(5 * time.Minute)
	for time.Now().Before(deadline) {
		h, err := svc.Engine().Health(context.Background())
		if err == nil && h.Stats.DirtyPatients == 0 && h.Stats.OutboxDepth == 0 {
			return
		}
		time.Sleep(50 * time.Millisecond)
	}
	b.Fatal("the service did not settle")
}

func dirSize(dir string) int64 {
	var n int64
	_ = filepath.Walk(dir, func(_ string, info os.FileInfo, err error) error {
		if err == nil && !info.IsDir() {
			n += info.Size()
		}
		return nil
	})
	return n
}
