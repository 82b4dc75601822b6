// Command compare times apportion against PyTorch on the benchmark zoo, side
// by side, in one run:
//
//	go run ./bench/compare [-quick] [-reps 5] [-out bench/RESULTS.md]
//
// For each zoo model (bench/models, written by `go run ./bench/zoo`) it times
// five tasks: predict (one sample), gradient (one sample), integrated
// gradients with 64 trapezoid points (one sample, one batched pass), SmoothGrad
// with 50 noisy copies (one sample, one batched pass), and integrated
// gradients with 64 points over many samples (throughput). Each side runs as
// a child process pinned to a thread count: the Go side with GOMAXPROCS set,
// the PyTorch side (bench/torch_side.py under /usr/bin/python3) with
// torch.set_num_threads; the Go side compiles the zoo models with
// nn.Options.Parallel = GOMAXPROCS, so that one call may split its batch
// over as many threads as one PyTorch call uses (at one thread nothing
// changes). Before timing, both sides compute outputs, input
// gradients and integrated gradients of the same input and must agree to
// 1e-5 (relative to the largest magnitude). Repetitions alternate between the
// sides and the median is reported.
//
// FLOPs are counted from the graph: 2 per multiply-accumulate of Gemm and
// Conv; a forward and backward pass counts 2 forward passes, because both
// sides compute gradients with respect to the input only (no weight
// gradients), and the input gradient of a linear layer costs one matrix
// product the size of its forward one. The peak is the float32 FMA ceiling
// of the cores the Go side may use (a register-only FMA loop on GOMAXPROCS
// goroutines, on 512-bit vectors where the CPU has AVX-512, as nn's tiles
// then run; internal/cpupeak), measured in the same run at the same
// thread count; the rate of nn's own matrix product on a one-MatMul model
// (256×256×256 and 64×1024×256 through Head.Forward) is reported beside it.
//
// Two more tables answer a user's questions. "IG to 0.1%" (igtol.go, one
// thread, the zoo and both demos): apportion's integrated gradients with a
// 0.1% tolerance against PyTorch's trapezoid rule at the smallest doubling
// of its point count that is within 0.1% relative L1 of the float64 exact
// integral. The forward anchor (anchor.go): predict at batch 1, 64 and
// 1024 beside ONNX Runtime (npm onnxruntime-node run by node on
// bench/ort_side.js, found through -ort-modules or NODE_PATH); without node
// or the package the run says so and goes on without it.
package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"time"

	"github.com/apportion/apportion/bench"
	"github.com/apportion/apportion/internal/cpupeak"
	"github.com/apportion/apportion/onnxlite"
)

func main() {
	child := flag.Bool("child", false, "serve the Go side of the protocol on stdin/stdout (used by compare itself)")
	quick := flag.Bool("quick", false, "shorter timings and 4 samples for the throughput row (finishes in a few minutes)")
	reps := flag.Int("reps", 5, "repetitions per measurement (median reported)")
	dir := flag.String("models", filepath.Join("bench", "models"), "directory of the zoo models (written when missing)")
	out := flag.String("out", filepath.Join("bench", "RESULTS.md"), "results file (empty: none)")
	python := flag.String("python", "/usr/bin/python3", "Python interpreter with torch and onnx")
	script := flag.String("torch-side", filepath.Join("bench", "torch_side.py"), "PyTorch side script")
	models := flag.String("only", "", "comma-separated zoo models (and demos, for the IG rows) to run (default all)")
	igOnly := flag.String("ig", "", "comma-separated models of the IG-to-0.1% rows (default: those -only names, or the zoo and both demos; none for no rows)")
	node := flag.String("node", "node", "node, for the ONNX Runtime forward anchor (skipped when absent)")
	ortSide := flag.String("ort-side", filepath.Join("bench", "ort_side.js"), "ONNX Runtime side script")
	ortModules := flag.String("ort-modules", os.Getenv("NODE_PATH"), "node_modules directory holding onnxruntime-node (default $NODE_PATH)")
	methods := flag.Bool("forward-only", true, "time the forward-only methods (Shapley values) against PyTorch's forward passes")
	zoo := flag.Bool("zoo", true, "time the zoo models' tasks")
	flag.Usage = func() {
		fmt.Fprintf(os.Stderr, "usage: go run ./bench/compare [-quick] [-reps N] [-out FILE]\n\nexample:\n  go run ./bench/compare -quick\n\n")
		flag.PrintDefaults()
	}
	flag.Parse()
	if *child {
		if err := runChild(*dir, os.Stdin, os.Stdout); err != nil {
			fmt.Fprintln(os.Stderr, "compare child:", err)
			os.Exit(1)
		}
		return
	}
	if *reps < 1 {
		fmt.Fprintln(os.Stderr, "compare: -reps must be at least 1")
		os.Exit(2)
	}
	cfg := config{quick: *quick, reps: *reps, dir: *dir, out: *out, python: *python, script: *script,
		node: *node, ortSide: *ortSide, ortModules: *ortModules, forwardOnly: *methods}
	if *models != "" {
		cfg.only = strings.Split(*models, ",")
	}
	if !*zoo {
		cfg.only = []string{}
	}
	cfg.ig = cfg.only
	if *igOnly != "" {
		cfg.ig = strings.Split(*igOnly, ",")
	}
	if err := run(cfg); err != nil {
		fmt.Fprintln(os.Stderr, "compare:", err)
		os.Exit(1)
	}
}

type config struct {
	quick          bool
	reps           int
	dir, out       string
	python, script string
	only           []string
	// ig are the models of the IG rows (nil: all).
	ig []string
	// node runs ortSide with NODE_PATH=ortModules.
	node, ortSide, ortModules string
	forwardOnly               bool
}

// task is one timed row.
type task struct {
	name    string
	label   string
	samples int
	// passes is the number of forward-equivalents per call: 1 per forward
	// sample, 2 per forward+backward sample (input gradients only).
	passes float64
}

func tasks(quick bool) []task {
	n := 64
	if quick {
		n = 4
	}
	return []task{
		{"predict", "predict (1)", 1, 1},
		{"gradient", "gradient (1)", 1, 2},
		{"ig64", "IG-64 (1)", 1, 2 * 64},
		{"smoothgrad50", "SmoothGrad-50 (1)", 1, 2 * 50},
		{"ig64x", fmt.Sprintf("IG-64 ×%d samples", n), n, 2 * 64 * float64(n)},
	}
}

// peer is a child process speaking the JSON-lines protocol.
type peer struct {
	cmd    *exec.Cmd
	in     io.WriteCloser
	out    *bufio.Scanner
	stderr *bytes.Buffer
}

func startPeer(name string, args []string, env []string) (*peer, error) {
	c := exec.Command(name, args...)
	c.Env = env
	var errBuf bytes.Buffer
	c.Stderr = &errBuf
	in, err := c.StdinPipe()
	if err != nil {
		return nil, err
	}
	outp, err := c.StdoutPipe()
	if err != nil {
		return nil, err
	}
	if err := c.Start(); err != nil {
		return nil, err
	}
	sc := bufio.NewScanner(outp)
	sc.Buffer(make([]byte, 64<<20), 64<<20)
	return &peer{cmd: c, in: in, out: sc, stderr: &errBuf}, nil
}

func (p *peer) call(req request) (response, error) {
	b, _ := json.Marshal(req)
	if _, err := p.in.Write(append(b, '\n')); err != nil {
		return response{}, fmt.Errorf("%s: %w (stderr: %s)", p.cmd.Path, err, p.stderr.String())
	}
	if !p.out.Scan() {
		return response{}, fmt.Errorf("%s: no answer (stderr: %s)", p.cmd.Path, p.stderr.String())
	}
	var r response
	if err := json.Unmarshal(p.out.Bytes(), &r); err != nil {
		return response{}, err
	}
	if r.Error != "" {
		return r, errors.New(r.Error)
	}
	return r, nil
}

func (p *peer) close() {
	p.in.Close()
	p.cmd.Wait()
}

// row is one measured line of the table.
type row struct {
	model, task string
	threads     int
	goSec       float64
	torchSec    float64 // 0 when torch is not available
	gflops      float64
	peakShare   float64
	allocs      float64
	bytes       float64
}

func (r row) ratio() float64 {
	if r.torchSec == 0 {
		return math.NaN()
	}
	return r.goSec / r.torchSec
}

func run(cfg config) error {
	if err := ensureModels(cfg.dir); err != nil {
		return err
	}
	torchVersion, torchErr := probeTorch(cfg.python)
	if torchErr != nil {
		fmt.Fprintf(os.Stderr, "compare: PyTorch not usable with %s (%v)\n  install it with: apt-get install python3-torch python3-onnx\n  running the Go side only\n", cfg.python, torchErr)
	}
	self, err := os.Executable()
	if err != nil {
		return err
	}
	loadStart := loadavg()
	started := time.Now()
	target := 0.3
	if cfg.quick {
		target = 0.08
	}
	specs := bench.Zoo
	if cfg.only != nil { // -only, or none for -zoo=false
		specs = nil
		for _, n := range cfg.only {
			s, err := bench.Lookup(n)
			if err != nil {
				if len(igModels(cfg.dir, []string{n})) == 1 {
					continue // a demo, for the IG rows
				}
				return err
			}
			specs = append(specs, s)
		}
	}
	flops := map[string]float64{}
	for _, s := range specs {
		m, err := onnxlite.DecodeFile(filepath.Join(cfg.dir, s.Name+".onnx"), onnxlite.DecodeOptions{})
		if err != nil {
			return err
		}
		f, err := bench.FLOPs(m, s.Input)
		if err != nil {
			return err
		}
		flops[s.Name] = float64(f)
	}
	ortVersion, ortErr := probeORT(cfg)
	if ortErr != nil {
		fmt.Fprintf(os.Stderr, "compare: ONNX Runtime not usable (%v)\n  install it with: npm install --ignore-scripts onnxruntime-node@1.30.0, and give -ort-modules DIR/node_modules\n  running without the forward anchor\n", ortErr)
	}
	var rows []row
	var anchors []anchorRow
	var igRows []igRow
	var checks []string
	var prows []perturbRow
	var pchecks []string
	peaks, gemms := map[int]float64{}, map[int]float64{}
	goVersion := runtime.Version()
	for _, threads := range []int{1, 2} {
		env := append(os.Environ(), fmt.Sprintf("GOMAXPROCS=%d", threads))
		gp, err := startPeer(self, []string{"-child", "-models", cfg.dir}, env)
		if err != nil {
			return err
		}
		var tp *peer
		if torchErr == nil {
			tenv := append(os.Environ(), fmt.Sprintf("OMP_NUM_THREADS=%d", threads), fmt.Sprintf("MKL_NUM_THREADS=%d", threads))
			if tp, err = startPeer(cfg.python, []string{cfg.script, "--threads", fmt.Sprint(threads), "--models", cfg.dir}, tenv); err != nil {
				gp.close()
				return err
			}
		}
		pk, err := gp.call(request{Cmd: "peak"})
		if err != nil {
			return err
		}
		peaks[threads], gemms[threads] = pk.GFLOPS, pk.GEMM
		fmt.Fprintf(os.Stderr, "threads=%d: FMA peak %.2f GFLOP/s; nn MatMul (best of 256³ and 64×1024×256) %.2f GFLOP/s\n", threads, pk.GFLOPS, pk.GEMM)
		for _, s := range specs {
			if threads == 1 && tp != nil {
				msg, err := agree(gp, tp, s.Name)
				if err != nil {
					gp.close()
					tp.close()
					return fmt.Errorf("%s: the two sides disagree, not timing: %w", s.Name, err)
				}
				checks = append(checks, msg)
				fmt.Fprintln(os.Stderr, msg)
			}
			for _, tk := range tasks(cfg.quick) {
				r, err := measure(gp, tp, s.Name, tk, cfg.reps, target)
				if err != nil {
					return fmt.Errorf("%s %s: %w", s.Name, tk.name, err)
				}
				r.threads = threads
				r.gflops = flops[s.Name] * tk.passes / r.goSec / 1e9
				r.peakShare = r.gflops / peaks[threads]
				rows = append(rows, r)
				fmt.Fprintln(os.Stderr, formatRow(r))
			}
			if ortErr == nil {
				a, err := anchor(cfg, gp, s, threads, target)
				if err != nil {
					return fmt.Errorf("%s forward anchor: %w", s.Name, err)
				}
				anchors = append(anchors, a...)
			}
		}
		if threads == 1 {
			for _, name := range igModels(cfg.dir, cfg.ig) {
				r, err := measureIG(gp, tp, name, cfg.reps, target)
				if err != nil {
					return fmt.Errorf("%s IG to 0.1%%: %w", name, err)
				}
				igRows = append(igRows, r)
				fmt.Fprintln(os.Stderr, formatIGRow(r))
			}
		}
		for _, c := range perturbCases() {
			if !cfg.forwardOnly {
				break
			}
			r, check, err := measurePerturb(gp, tp, cfg.dir, c, cfg.reps, target)
			if err != nil {
				return fmt.Errorf("%s: %w", c.name, err)
			}
			r.threads = threads
			if check != "" && threads == 1 {
				pchecks = append(pchecks, check)
				fmt.Fprintln(os.Stderr, check)
			}
			prows = append(prows, r)
			fmt.Fprintln(os.Stderr, formatPerturbRow(r))
		}
		gp.close()
		if tp != nil {
			tp.close()
		}
	}
	loadEnd := loadavg()
	table := ""
	if len(rows) > 0 {
		table = renderTable(rows)
	}
	table += renderIG(igRows) + renderAnchors(anchors)
	if prows != nil {
		table += "\n" + renderPerturbTable(prows)
	}
	fmt.Print(table)
	if cfg.out != "" {
		md := renderMarkdown(cfg, rows, checks, peaks, gemms, goVersion, torchVersion, loadStart, loadEnd, time.Since(started))
		md += igMarkdown(igRows) + anchorMarkdown(anchors, ortVersion, ortErr)
		if prows != nil {
			md += "\n" + renderPerturbMarkdown(prows, pchecks)
		}
		if err := os.WriteFile(cfg.out, []byte(md), 0o644); err != nil {
			return err
		}
		fmt.Fprintf(os.Stderr, "wrote %s\n", cfg.out)
	}
	return nil
}

// ensureModels writes the zoo into dir when a model file is missing.
func ensureModels(dir string) error {
	for _, s := range bench.All {
		path := filepath.Join(dir, s.Name+".onnx")
		if _, err := os.Stat(path); err == nil {
			continue
		}
		if err := os.MkdirAll(dir, 0o755); err != nil {
			return err
		}
		m, err := bench.Build(s)
		if err != nil {
			return err
		}
		var buf bytes.Buffer
		if err := onnxlite.Encode(&buf, m); err != nil {
			return err
		}
		if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
			return err
		}
	}
	return nil
}

func probeTorch(python string) (string, error) {
	out, err := exec.Command(python, "-c", "import torch, onnx; print(torch.__version__)").CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("%v: %s", err, strings.TrimSpace(string(out)))
	}
	return strings.TrimSpace(string(out)), nil
}

// agree compares outputs, input gradients and IG attributions of both sides
// on the same batch of two inputs.
func agree(gp, tp *peer, model string) (string, error) {
	g, err := gp.call(request{Cmd: "check", Model: model, N: 2})
	if err != nil {
		return "", fmt.Errorf("go side: %w", err)
	}
	t, err := tp.call(request{Cmd: "check", Model: model, N: 2})
	if err != nil {
		return "", fmt.Errorf("torch side: %w", err)
	}
	if g.Target != t.Target {
		return "", fmt.Errorf("top class %d (Go) vs %d (torch)", g.Target, t.Target)
	}
	const tol = 1e-5
	var parts []string
	for _, c := range []struct {
		name string
		a, b []float64
	}{{"outputs", g.Out, t.Out}, {"gradients", g.Grad, t.Grad}, {"IG-64", g.IG, t.IG}} {
		d, scale, err := maxDiff(c.a, c.b)
		if err != nil {
			return "", fmt.Errorf("%s: %w", c.name, err)
		}
		if d > tol*math.Max(scale, 1) {
			return "", fmt.Errorf("%s differ by %.3g (scale %.3g, tolerance %.0e relative)", c.name, d, scale, tol)
		}
		parts = append(parts, fmt.Sprintf("%s max |Δ| %.2g (scale %.2g)", c.name, d, scale))
	}
	return fmt.Sprintf("%s: sides agree within 1e-5: %s", model, strings.Join(parts, ", ")), nil
}

func maxDiff(a, b []float64) (d, scale float64, err error) {
	if len(a) != len(b) || len(a) == 0 {
		return 0, 0, fmt.Errorf("lengths %d and %d", len(a), len(b))
	}
	for i := range a {
		d = math.Max(d, math.Abs(a[i]-b[i]))
		scale = math.Max(scale, math.Abs(b[i]))
	}
	return d, scale, nil
}

// measure times tk on both sides: a calibration call sets the iteration
// count so that one measurement lasts about target seconds, then reps
// measurements alternate between the sides.
func measure(gp, tp *peer, model string, tk task, reps int, target float64) (row, error) {
	req := request{Cmd: "time", Model: model, Task: tk.name, Samples: tk.samples}
	var treq *request
	if tp != nil {
		treq = &req
	}
	t, err := timeSides(gp, &req, tp, treq, reps, target)
	if err != nil {
		return row{}, err
	}
	return row{model: model, task: tk.label, goSec: t.goSec, torchSec: t.otherSec, allocs: t.allocs, bytes: t.bytes}, nil
}

// settle is the pause before each measurement of two alternating sides:
// a thread pool that has just finished its side's calls keeps its threads
// spinning for a while before they sleep (ONNX Runtime's, PyTorch's OpenMP
// threads), and those threads take the cores from the other side's next
// measurement. Without it the Go side's mlp-m forward at batch 1024 on two
// threads measured 3.21 ms right after ONNX Runtime's calls and 2.14 ms
// after a 200 ms pause (AMD EPYC, 2 cores).
const settle = 100 * time.Millisecond

// timing is the median time per call of both sides, and the Go side's
// allocations per call.
type timing struct {
	goSec, otherSec float64
	allocs, bytes   float64
}

// timeSides times the "time" requests greq on gp and oreq on op (none when
// op is nil): a calibration call sets each side's iteration count so that
// one measurement lasts about target seconds, then reps measurements
// alternate between the sides, each after a pause of settle.
func timeSides(gp *peer, greq *request, op *peer, oreq *request, reps int, target float64) (timing, error) {
	iters := func(p *peer, req request) (int, error) {
		req.Iters = 1
		r, err := p.call(req)
		if err != nil {
			return 0, err
		}
		return max(1, int(math.Ceil(target/math.Max(r.Seconds, 1e-7)))), nil
	}
	gi, err := iters(gp, *greq)
	if err != nil {
		return timing{}, fmt.Errorf("go side: %w", err)
	}
	oi := 0
	if op != nil {
		if oi, err = iters(op, *oreq); err != nil {
			return timing{}, fmt.Errorf("%s side: %w", filepath.Base(op.cmd.Path), err)
		}
	}
	var gs, others, allocs, byts []float64
	for i := 0; i < reps; i++ {
		req := *greq
		req.Iters = gi
		if op != nil {
			time.Sleep(settle)
		}
		r, err := gp.call(req)
		if err != nil {
			return timing{}, fmt.Errorf("go side: %w", err)
		}
		gs = append(gs, r.Seconds/float64(gi))
		allocs = append(allocs, r.Allocs)
		byts = append(byts, r.Bytes)
		if op != nil {
			req := *oreq
			req.Iters = oi
			time.Sleep(settle)
			r, err := op.call(req)
			if err != nil {
				return timing{}, fmt.Errorf("%s side: %w", filepath.Base(op.cmd.Path), err)
			}
			others = append(others, r.Seconds/float64(oi))
		}
	}
	t := timing{goSec: median(gs), allocs: median(allocs), bytes: median(byts)}
	if op != nil {
		t.otherSec = median(others)
	}
	return t, nil
}

func median(v []float64) float64 {
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	n := len(s)
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}

func loadavg() string {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return "unknown"
	}
	f := strings.Fields(string(b))
	if len(f) < 3 {
		return "unknown"
	}
	return strings.Join(f[:3], " ")
}

func cpuModel() string {
	b, err := os.ReadFile("/proc/cpuinfo")
	if err != nil {
		return "unknown"
	}
	for _, line := range strings.Split(string(b), "\n") {
		if k, v, ok := strings.Cut(line, ":"); ok && strings.TrimSpace(k) == "model name" {
			return strings.TrimSpace(v)
		}
	}
	return "unknown"
}

// simdFlags lists the vector-extension flags of the first CPU in
// /proc/cpuinfo.
func simdFlags() string {
	b, err := os.ReadFile("/proc/cpuinfo")
	if err != nil {
		return "unknown"
	}
	for _, line := range strings.Split(string(b), "\n") {
		k, v, ok := strings.Cut(line, ":")
		if !ok || strings.TrimSpace(k) != "flags" {
			continue
		}
		var out []string
		for _, f := range strings.Fields(v) {
			if strings.HasPrefix(f, "sse") || strings.HasPrefix(f, "ssse") || strings.HasPrefix(f, "avx") || f == "fma" || f == "f16c" || strings.HasPrefix(f, "amx") {
				out = append(out, f)
			}
		}
		return strings.Join(out, " ")
	}
	return "unknown"
}

func human(sec float64) string {
	switch {
	case sec == 0:
		return "-"
	case sec < 1e-3:
		return fmt.Sprintf("%.1f µs", sec*1e6)
	case sec < 1:
		return fmt.Sprintf("%.2f ms", sec*1e3)
	}
	return fmt.Sprintf("%.2f s", sec)
}

func ratioString(r row) string {
	if math.IsNaN(r.ratio()) {
		return "-"
	}
	return fmt.Sprintf("%.2f", r.ratio())
}

func formatRow(r row) string {
	return fmt.Sprintf("%-6s %-20s %d  %12s %12s %7s %8.2f %6.1f%% %10.0f %12.1f",
		r.model, r.task, r.threads, human(r.goSec), human(r.torchSec), ratioString(r), r.gflops, 100*r.peakShare, r.allocs, r.bytes/1024)
}

func worst(rows []row, threads int) (row, bool) {
	var w row
	found := false
	for _, r := range rows {
		if (threads == 0 || r.threads == threads) && !math.IsNaN(r.ratio()) && (!found || r.ratio() > w.ratio()) {
			w, found = r, true
		}
	}
	return w, found
}

func renderTable(rows []row) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%-6s %-20s %s  %12s %12s %7s %8s %7s %10s %12s\n", "model", "task", "T", "apportion", "torch", "ratio", "GFLOP/s", "peak", "allocs", "KiB/call")
	for _, r := range rows {
		b.WriteString(formatRow(r) + "\n")
	}
	if w, ok := worst(rows, 1); ok {
		fmt.Fprintf(&b, "worst ratio at 1 thread: %.2f (%s %s)\n", w.ratio(), w.model, w.task)
	}
	if w, ok := worst(rows, 0); ok {
		fmt.Fprintf(&b, "worst ratio apportion/torch: %.2f (%s %s, %d threads)\n", w.ratio(), w.model, w.task, w.threads)
	} else {
		fmt.Fprintf(&b, "worst ratio apportion/torch: - (PyTorch not available: apt-get install python3-torch)\n")
	}
	return b.String()
}

func renderMarkdown(cfg config, rows []row, checks []string, peaks, gemms map[int]float64, goVersion, torchVersion, loadStart, loadEnd string, took time.Duration) string {
	var b strings.Builder
	b.WriteString("# apportion vs PyTorch: benchmark results\n\n")
	b.WriteString("Written by `go run ./bench/compare")
	if cfg.quick {
		b.WriteString(" -quick")
	}
	b.WriteString("`; see bench/compare/main.go for the method.\n\n")
	b.WriteString("## Machine\n\n")
	fmt.Fprintf(&b, "- CPU: %s, %d cores visible (`nproc`)\n", cpuModel(), runtime.NumCPU())
	fmt.Fprintf(&b, "- SIMD flags (/proc/cpuinfo): %s\n", simdFlags())
	fmt.Fprintf(&b, "- Go: %s, GOARCH %s\n", goVersion, runtime.GOARCH)
	if torchVersion == "" {
		torchVersion = "not available (apt-get install python3-torch)"
	}
	fmt.Fprintf(&b, "- PyTorch: %s (Debian python3-torch, %s)\n", torchVersion, cfg.python)
	fmt.Fprintf(&b, "- Load average (1, 5, 15 min): %s at the start, %s at the end; the machine is shared, so timings are noisy\n", loadStart, loadEnd)
	fmt.Fprintf(&b, "- Peak (float32 FMA ceiling: a register-only FMA loop on %s vectors on GOMAXPROCS goroutines, best of ten trials, measured in this run): %.2f GFLOP/s at 1 thread, %.2f at 2\n", cpupeak.Vector(), peaks[1], peaks[2])
	fmt.Fprintf(&b, "- nn's float32 matrix product (a one-MatMul model through Head.Forward, best of ten trials on 256×256×256 and 64×1024×256): %.2f GFLOP/s at 1 thread, %.2f at 2\n", gemms[1], gemms[2])
	fmt.Fprintf(&b, "- Run: %d repetitions per row, alternating sides with a %s pause before each (an idle thread pool of the side just timed spins for a while), median; took %s; finished %s\n\n", cfg.reps, settle, took.Round(time.Second), time.Now().UTC().Format("2006-01-02 15:04 MST"))
	if len(checks) > 0 {
		b.WriteString("## Agreement before timing\n\n")
		for _, c := range checks {
			fmt.Fprintf(&b, "- %s\n", c)
		}
		b.WriteString("\n")
	}
	if len(rows) == 0 { // -zoo=false
		return b.String()
	}
	b.WriteString("## Results\n\n")
	b.WriteString("T is the thread count (GOMAXPROCS for apportion, torch.set_num_threads for PyTorch). GFLOP/s counts 2·MACs of Gemm and Conv from the graph, ×2 for a forward and backward pass (both sides compute input gradients only; the input gradient of a Gemm or Conv costs the MACs of its forward); peak is that rate over the FMA peak above at the same thread count (one call runs its pass on one core, so at 2 threads about half at best). Allocations and KiB are per call on the Go side.\n\n")
	b.WriteString("| model | task | T | apportion | torch | ratio | GFLOP/s | peak | allocs/call | KiB/call |\n|---|---|---|---|---|---|---|---|---|---|\n")
	for _, r := range rows {
		fmt.Fprintf(&b, "| %s | %s | %d | %s | %s | %s | %.2f | %.1f%% | %.0f | %.1f |\n", r.model, r.task, r.threads, human(r.goSec), human(r.torchSec), ratioString(r), r.gflops, 100*r.peakShare, r.allocs, r.bytes/1024)
	}
	b.WriteString("\n")
	if w, ok := worst(rows, 1); ok {
		fmt.Fprintf(&b, "Worst ratio at 1 thread: %.2f (%s %s).\n\n", w.ratio(), w.model, w.task)
	}
	if w, ok := worst(rows, 0); ok {
		fmt.Fprintf(&b, "worst ratio apportion/torch: %.2f (%s %s, %d threads)\n", w.ratio(), w.model, w.task, w.threads)
	}
	return b.String()
}
