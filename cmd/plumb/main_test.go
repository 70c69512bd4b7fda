package main

import (
	"bytes"
	"compress/gzip"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/worker"
)

// syncBuffer is a bytes.Buffer safe for one writer and one reader.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func run(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var o, e bytes.Buffer
	code = mainCode(context.Background(), args, &o, &e)
	return code, o.String(), e.String()
}

func TestHelp(t *testing.T) {
	code, out, _ := run(t, "help")
	if code != 0 || !strings.Contains(out, "Commands:") || !strings.Contains(out, "qualified person") {
		t.Fatalf("help: code %d, output %q", code, out)
	}
	for _, c := range commands {
		code, _, errOut := run(t, c.name, "-h")
		if code != 0 || !strings.Contains(errOut, "Examples:") || !strings.Contains(errOut, "Flags:") {
			t.Errorf("%s -h: code %d, output %q", c.name, code, errOut)
		}
	}
	if code, _, errOut := run(t, "frobnicate"); code != 2 || !strings.Contains(errOut, "unknown command") {
		t.Errorf("unknown command: code %d, %q", code, errOut)
	}
	if code, _, errOut := run(t, "run"); code != 2 || !strings.Contains(errOut, "--sites is required") {
		t.Errorf("run without --sites: code %d, %q", code, errOut)
	}
	if code, _, errOut := run(t, "demo", "--duration", "0", "--meter-flat", "0"); code == 0 || !strings.Contains(errOut, "--meter-flat 0") {
		t.Errorf("demo --meter-flat 0: code %d, %q; want a refusal naming the flag", code, errOut)
	}
	if code, _, errOut := run(t, "replay", "--data", t.TempDir()); code != 1 || !strings.Contains(errOut, "sites.json") {
		t.Errorf("replay of an empty folder: code %d, %q", code, errOut)
	}
	for _, bad := range [][]string{
		{"--alarm-history", "50"},  // not beyond the recent half-life
		{"--alarm-z", "-1"},        // not positive
		{"--alarm-tolerance", "1"}, // not within (0, 1)
		{"--alarm-recent", "0.5"},  // under one outcome
	} {
		code, _, errOut := run(t, append([]string{"demo", "--duration", "0"}, bad...)...)
		if code == 0 || !strings.Contains(errOut, "conformal: alarm") {
			t.Errorf("demo %v: code %d, %q; want a refusal naming the alarm option", bad, code, errOut)
		}
	}
}

// TestDemo runs the README's demo command (as fast as possible) and checks
// that its report shows the injected fault's alarms being raised, raw_drift
// within a day of the fault, and that the five sites without a fault raise
// each kind of alarm at most four times in the four weeks (the fleet is
// invented: this holds the demo to what it shows, not the method to the
// outside world; the open-data tests of worker/backtest do that).
func TestDemo(t *testing.T) {
	if testing.Short() {
		t.Skip("the demo takes a few seconds")
	}
	code, out, errOut := run(t, "demo", "--duration", "0", "--every", "1h")
	if code != 0 {
		t.Fatalf("demo: code %d\n%s\n%s", code, out, errOut)
	}
	for _, want := range []string{
		"injected fault: pv-heron-flats",
		"== report",
		"Fault caught: coverage_off alarm raised on pv-heron-flats",
		"Fault caught: raw_drift alarm raised on pv-heron-flats",
		"The fleet is invented",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("demo output lacks %q:\n%s", want, out)
		}
	}
	m := regexp.MustCompile(`Fault caught: raw_drift alarm raised on pv-heron-flats at \S+ \([^)]*\), (\S+) after the fault`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("no raw_drift delay in the report:\n%s", out)
	}
	if d, err := time.ParseDuration(m[1]); err != nil || d > 24*time.Hour {
		t.Errorf("raw_drift raised %s after the fault (%v), want within a day", m[1], err)
	}
	rows := regexp.MustCompile(`(?m)^((?:pv|wind)-\S+)\s.*\s(\d+)\s+(\d+)$`).FindAllStringSubmatch(out, -1)
	if len(rows) != 6 {
		t.Fatalf("%d site rows in the report, want 6:\n%s", len(rows), out)
	}
	for _, r := range rows {
		if r[1] == "pv-heron-flats" {
			continue
		}
		if c, _ := strconv.Atoi(r[2]); c > 4 {
			t.Errorf("%s: %d coverage_off alarms without a fault", r[1], c)
		}
		if c, _ := strconv.Atoi(r[3]); c > 4 {
			t.Errorf("%s: %d raw_drift alarms without a fault", r[1], c)
		}
	}
}

// TestThreeCommands runs `plumb run`, `plumb replay` and `plumb tail` as
// the README's walk-through does, in one process: the worker's embedded
// server on a free port, a replay of the first days of the demo data, and a
// tail that must show a bundle as a table (during a fast replay the worker
// coalesces, but always publishes a site's last bundle).
func TestThreeCommands(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var wOut, wErr syncBuffer
	done := make(chan int, 1)
	go func() {
		done <- mainCode(ctx, []string{"run", "--sites", "../../testdata/demo/sites.json", "--listen", "127.0.0.1:0", "--metrics", "127.0.0.1:0"}, &wOut, &wErr)
	}()
	urlRE := regexp.MustCompile(`worker ready: .* --nats (nats://[0-9.:]+)`)
	var url string
	for deadline := time.Now().Add(20 * time.Second); url == ""; {
		if m := urlRE.FindStringSubmatch(wOut.String()); m != nil {
			url = m[1]
		} else if time.Now().After(deadline) {
			t.Fatalf("worker not ready:\n%s\n%s", wOut.String(), wErr.String())
		}
		time.Sleep(20 * time.Millisecond)
	}

	var tOut syncBuffer
	tailDone := make(chan int, 1)
	go func() {
		tailDone <- mainCode(ctx, []string{"tail", "--nats", url, "--site", "wind-gorse-hill", "--count", "1"}, &tOut, io.Discard)
	}()
	time.Sleep(300 * time.Millisecond) // let tail subscribe
	code, out, errOut := run(t, "replay", "--nats", url, "--data", "../../testdata/demo", "--to", "2026-03-03", "--quiet")
	if code != 0 || !strings.Contains(out, "published 24 weather runs and 570 readings") {
		t.Fatalf("replay: code %d\n%s\n%s", code, out, errOut)
	}
	select {
	case code := <-tailDone:
		if code != 0 {
			t.Fatalf("tail: code %d", code)
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("tail saw no bundle:\n%s", tOut.String())
	}
	if s := tOut.String(); !strings.Contains(s, "== wind-gorse-hill") || !strings.Contains(s, "q0.50") {
		t.Fatalf("tail output:\n%s", s)
	}
	checkCoverageEndpoint(t, wErr.String())
	cancel()
	if code := <-done; code != 0 {
		t.Fatalf("worker exit code %d:\n%s", code, wErr.String())
	}
}

// checkCoverageEndpoint reads the worker's coverage monitor of a site over
// HTTP (the address is in the worker's log): every lead bucket and level,
// settled forecasts after the replay, figures within their ranges; and 404
// for a site not in the registry.
func checkCoverageEndpoint(t *testing.T, log string) {
	t.Helper()
	m := regexp.MustCompile(`http://127\.0\.0\.1:\d+`).FindString(log)
	if m == "" {
		t.Fatalf("no metrics address in the log:\n%s", log)
	}
	resp, err := http.Get(m + "/coverage/wind-gorse-hill")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var got struct {
		Site  string
		Cells []worker.CellReport
	}
	if err := json.NewDecoder(resp.Body).Decode(&got); err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("GET /coverage: %s, %v", resp.Status, err)
	}
	if got.Site != "wind-gorse-hill" || len(got.Cells) != 8*19 {
		t.Fatalf("site %q, %d cells, want 152 (8 lead buckets, 19 levels)", got.Site, len(got.Cells))
	}
	settled := 0
	for _, c := range got.Cells {
		settled += c.Settled
		if c.Coverage < 0 || c.Coverage > 1 || c.KupiecP < 0 || c.KupiecP > 1 || c.Window > c.Settled {
			t.Errorf("cell %+v", c)
		}
		if c.Settled > 0 && c.CalibratedLevel == 0 {
			t.Errorf("cell %s %.2f settled %d but tells no correction", c.LeadBucket, c.Level, c.Settled)
		}
	}
	if settled == 0 {
		t.Error("no forecast settled after two days of readings")
	}
	resp2, err := http.Get(m + "/coverage/no-such-site")
	if err != nil {
		t.Fatal(err)
	}
	resp2.Body.Close()
	if resp2.StatusCode != http.StatusNotFound {
		t.Errorf("unknown site: %s, want 404", resp2.Status)
	}
}

// TestBacktestCommand runs `plumb backtest` on a few days of the demo data
// and checks its three files.
func TestBacktestCommand(t *testing.T) {
	if testing.Short() {
		t.Skip("a short backtest")
	}
	out := t.TempDir()
	code, stdout, errOut := run(t, "backtest", "--data", "../../testdata/demo", "--sites", "pv-saltcombe,wind-ketch-bank",
		"--from", "2026-03-09", "--to", "2026-03-11", "--out", out, "--quiet")
	if code != 0 {
		t.Fatalf("backtest: code %d\n%s\n%s", code, stdout, errOut)
	}
	for _, want := range []string{"stack+aci", "climatology+none (ref)", "persistence+none (ref)", "day-ahead 00h", "report.html"} {
		if !strings.Contains(stdout, want) {
			t.Errorf("summary lacks %q:\n%s", want, stdout)
		}
	}
	data, err := os.ReadFile(filepath.Join(out, "report.json"))
	if err != nil {
		t.Fatal(err)
	}
	var rep struct {
		Sites    []string `json:"sites"`
		Variants []struct {
			Name     string `json:"name"`
			DayAhead struct {
				All struct {
					N int `json:"n"`
				} `json:"all"`
			} `json:"day_ahead"`
		} `json:"variants"`
	}
	if err := json.Unmarshal(data, &rep); err != nil {
		t.Fatal(err)
	}
	// 2 days x 96 quarter-hours x 2 sites in the day-ahead view.
	if len(rep.Sites) != 2 || len(rep.Variants) != 3 || rep.Variants[0].DayAhead.All.N != 2*96*2 {
		t.Fatalf("report: %+v", rep)
	}
	for _, f := range []string{"report.html", "forecasts.arrow"} {
		if st, err := os.Stat(filepath.Join(out, f)); err != nil || st.Size() == 0 {
			t.Fatalf("%s: %v", f, err)
		}
	}
	// A malformed folder is refused with the file and line.
	bad := t.TempDir()
	os.WriteFile(filepath.Join(bad, "sites.json"), []byte(`[{"id":"a","kind":"pv","capacity_mw":1}]`), 0o644)
	os.WriteFile(filepath.Join(bad, "weather.csv"), []byte("site,issued_at,valid_start,valid_minutes,ghi_wm2\na,2026-01-01T00:00:00Z,2026-01-01T00:00:00Z,60,1\n"), 0o644)
	os.WriteFile(filepath.Join(bad, "meter.csv"), []byte("site,interval_start,interval_minutes,power_mw\na,not-a-time,60,1\n"), 0o644)
	code, _, errOut = run(t, "backtest", "--data", bad, "--out", t.TempDir(), "--quiet")
	if code != 1 || !strings.Contains(errOut, "meter.csv:2") || !strings.Contains(errOut, "interval_start") {
		t.Fatalf("malformed folder: code %d, %q", code, errOut)
	}
}

// TestAlarmLine: plumb tail writes an alarm event on one line with its
// state, event time, site, kind, level, lead bucket and reason.
func TestAlarmLine(t *testing.T) {
	e := conformal.Event{Site: "pv-heron-flats", Kind: conformal.KindRawDrift, State: conformal.StateRaised, Level: 0.1,
		LeadBucket: "0h-1h", EventTime: time.Date(2026, 3, 16, 17, 45, 0, 0, time.UTC), Reason: "raw model coverage moved"}
	want := "ALARM raised  2026-03-16T17:45:00Z pv-heron-flats raw_drift level 0.10 lead 0h-1h: raw model coverage moved"
	if got := alarmLine(e); got != want {
		t.Errorf("alarmLine =\n%q, want\n%q", got, want)
	}
}

// TestBenchCommand runs a short plumb bench on the embedded server with its
// JSON result and CPU profile, and checks that readings went in, bundles
// came out, and the profile is a gzip stream (the format runtime/pprof
// writes and go tool pprof reads).
func TestBenchCommand(t *testing.T) {
	if testing.Short() {
		t.Skip("a few seconds of load")
	}
	dir := t.TempDir()
	jsonOut, prof := filepath.Join(dir, "bench.json"), filepath.Join(dir, "cpu.prof")
	code, out, errOut := run(t, "bench", "--sites", "20", "--duration", "3s", "--warmup", "1s",
		"--model", "baseline", "--json", jsonOut, "--cpu-profile", prof)
	if code != 0 {
		t.Fatalf("bench: code %d\nstdout %s\nstderr %s", code, out, errOut)
	}
	if !strings.Contains(out, "latency publish -> bundle") {
		t.Errorf("bench output lacks the latency line:\n%s", out)
	}
	data, err := os.ReadFile(jsonOut)
	if err != nil {
		t.Fatal(err)
	}
	var res BenchResult
	if err := json.Unmarshal(data, &res); err != nil {
		t.Fatalf("bench JSON: %v", err)
	}
	if res.Load == nil || res.Load.Readings == 0 || res.Load.Bundles == 0 || res.Load.LatencyN == 0 {
		t.Errorf("bench result shows no traffic: %+v", res.Load)
	}
	f, err := os.Open(prof)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	zr, err := gzip.NewReader(f)
	if err != nil {
		t.Fatalf("CPU profile is not gzip: %v", err)
	}
	n, err := io.Copy(io.Discard, zr)
	if err != nil || n == 0 {
		t.Errorf("CPU profile: %d bytes, %v", n, err)
	}
	if code, _, errOut := run(t, "bench", "--sites", "2", "--duration", "1s", "--cpu-profile", filepath.Join(dir, "no", "such", "dir", "p")); code == 0 || !strings.Contains(errOut, "--cpu-profile") {
		t.Errorf("bench with an unwritable profile: code %d, %q", code, errOut)
	}
}
