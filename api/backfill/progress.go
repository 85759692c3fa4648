package backfill

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// progress counts what a run has done and shows it: a status line redrawn
// in place on a terminal, plain log lines otherwise. It never shows a
// patient or resource identifier.
type progress struct {
	out      io.Writer
	terminal bool
	every    time.Duration
	stats    func(context.Context) (store.Stats, error)

	phase               atomicString
	export              atomicString // the server's X-Progress
	files, filesTotal   atomic.Int64
	bytes, bytesTotal   atomic.Int64
	resources           atomic.Int64
	deletions           atomic.Int64
	patients            atomic.Int64
	patientsTotal       atomic.Int64
	writes, writesTotal atomic.Int64
	dead                atomic.Int64
	phaseStart          atomic.Int64 // unix nanoseconds
	phaseBase           atomic.Int64 // the phase's counter when it began
	lastWidth           int
	mu                  sync.Mutex
}

func newProgress(opts Options, stats func(context.Context) (store.Stats, error)) *progress {
	p := &progress{out: opts.Progress, terminal: opts.Terminal && opts.Progress != nil, every: opts.ProgressEvery, stats: stats}
	p.setPhase("start")
	return p
}

func (p *progress) setPhase(name string) {
	p.phase.Store(name)
	p.phaseStart.Store(time.Now().UnixNano())
	p.phaseBase.Store(p.counter(name))
}

func (p *progress) setExport(x string) { p.export.Store(x) }

// counter is the measure of a phase's advance, for its rate.
func (p *progress) counter(phase string) int64 {
	switch phase {
	case "export":
		return p.bytes.Load()
	case "read":
		return p.resources.Load()
	case "delete":
		return p.deletions.Load()
	case "derive":
		return p.patients.Load()
	case "write":
		return p.writes.Load() + p.dead.Load()
	}
	return 0
}

// start shows progress until the returned function is called, which shows
// it one last time.
func (p *progress) start(ctx context.Context, log *slog.Logger) func() {
	done := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		t := time.NewTicker(p.every)
		defer t.Stop()
		for {
			select {
			case <-done:
				return
			case <-t.C:
				p.show(ctx, log)
			}
		}
	}()
	var once sync.Once
	return func() {
		once.Do(func() {
			close(done)
			wg.Wait()
			p.show(ctx, log)
			if p.terminal {
				fmt.Fprintln(p.out)
			}
		})
	}
}

// snapshot is one reading of the counters.
type snapshot struct {
	phase, export             string
	files, filesTotal         int64
	bytes, bytesTotal         int64
	resources, deletions      int64
	patients, patientsTotal   int64
	writes, writesTotal, dead int64
	rate                      float64 // of the phase's counter, per second
	left                      time.Duration
}

func (p *progress) snapshot(ctx context.Context) snapshot {
	s := snapshot{
		phase: p.phase.Load(), export: p.export.Load(),
		files: p.files.Load(), filesTotal: p.filesTotal.Load(),
		bytes: p.bytes.Load(), bytesTotal: p.bytesTotal.Load(), resources: p.resources.Load(), deletions: p.deletions.Load(),
		patients: p.patients.Load(), patientsTotal: p.patientsTotal.Load(),
		writes: p.writes.Load(), writesTotal: p.writesTotal.Load(), dead: p.dead.Load(),
	}
	// Patients and writes advance inside the engine: read them from the
	// store so the figures move while a pass runs.
	if st, err := p.stats(context.WithoutCancel(ctx)); err == nil {
		if s.phase == "derive" && s.patientsTotal > 0 {
			s.patients = max(s.patients, s.patientsTotal-int64(st.DirtyPatients))
		}
	}
	elapsed := time.Since(time.Unix(0, p.phaseStart.Load())).Seconds()
	now := p.counter(s.phase)
	if s.phase == "derive" {
		now = s.patients
	}
	if elapsed > 0 {
		s.rate = float64(now-p.phaseBase.Load()) / elapsed
	}
	remaining := int64(-1)
	switch s.phase {
	case "derive":
		remaining = s.patientsTotal - s.patients
	case "write":
		remaining = s.writesTotal - s.writes - s.dead
	case "read":
		if s.bytesTotal > 0 && s.bytes > 0 {
			// Local files: time left from the bytes read so far.
			s.left = time.Duration(float64(s.bytesTotal-s.bytes) / float64(s.bytes) * elapsed * float64(time.Second))
		}
	}
	if remaining > 0 && s.rate > 0 {
		s.left = time.Duration(float64(remaining) / s.rate * float64(time.Second))
	}
	return s
}

func (p *progress) show(ctx context.Context, log *slog.Logger) {
	s := p.snapshot(ctx)
	if s.phase == "start" {
		return
	}
	if !p.terminal {
		log.InfoContext(ctx, "backfill progress", "phase", s.phase, "export", s.export,
			"files", s.files, "files_total", s.filesTotal, "bytes", s.bytes,
			"resources", s.resources, "deletions", s.deletions, "patients", s.patients, "patients_total", s.patientsTotal,
			"writes_acknowledged", s.writes, "writes_total", s.writesTotal, "dead_letters", s.dead,
			"rate_per_second", fmt.Sprintf("%.1f", s.rate), "time_left", s.left.Round(time.Second).String())
		return
	}
	line := s.line()
	p.mu.Lock()
	defer p.mu.Unlock()
	pad := ""
	if n := p.lastWidth - len(line); n > 0 {
		pad = strings.Repeat(" ", n)
	}
	p.lastWidth = len(line)
	fmt.Fprintf(p.out, "\r%s%s", line, pad)
}

// line is the terminal status line.
func (s snapshot) line() string {
	var parts []string
	files := fmt.Sprintf("files %d", s.files)
	if s.filesTotal > 0 {
		files = fmt.Sprintf("files %d/%d", s.files, s.filesTotal)
	}
	parts = append(parts, s.phase, files, humanBytes(s.bytes))
	if s.phase == "export" && s.export != "" {
		parts = append(parts, "server: "+s.export)
	}
	if s.resources > 0 {
		parts = append(parts, fmt.Sprintf("%d resources", s.resources))
	}
	if s.deletions > 0 {
		parts = append(parts, fmt.Sprintf("%d deletions", s.deletions))
	}
	if s.patientsTotal > 0 {
		parts = append(parts, fmt.Sprintf("patients %d/%d", s.patients, s.patientsTotal))
	}
	if s.writesTotal > 0 || s.writes > 0 {
		parts = append(parts, fmt.Sprintf("writes %d/%d acknowledged", s.writes, s.writesTotal))
	}
	if s.dead > 0 {
		parts = append(parts, fmt.Sprintf("%d refused", s.dead))
	}
	unit := map[string]string{"export": "B/s", "read": "resources/s", "delete": "deletions/s", "derive": "patients/s", "write": "writes/s"}[s.phase]
	if unit != "" && s.rate > 0 {
		parts = append(parts, fmt.Sprintf("%.1f %s", s.rate, unit))
	}
	if s.left > 0 {
		parts = append(parts, "~"+s.left.Round(time.Second).String()+" left")
	}
	return strings.Join(parts, " · ")
}
