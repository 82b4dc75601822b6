package main

import (
	"bytes"
	"context"
	"fmt"
	"path/filepath"
	"runtime"
	"strings"
	"time"

	"github.com/apportion/apportion/bench"
	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// The forward-only table: Shapley values, which need only forward passes,
// timed whole on the Go side (sampling the reference rows, building every
// coalition's rows, the model calls in batches of
// gradattr.DefaultForwardBatch, the estimator's arithmetic), against
// PyTorch running just the forward passes of the same number of rows in
// batches of the same size: what the model calls alone cost there, a lower
// bound for any PyTorch implementation of the method.

// perturbCase is one row of the forward-only table.
type perturbCase struct {
	name  string
	label string
	// model is "demo:" and a demo scenario, or a bench model's name.
	model string
	opts  gradattr.Options
}

func perturbCases() []perturbCase {
	shapley := func(est gradattr.Estimator) gradattr.Options {
		return gradattr.Options{Method: gradattr.MethodShapley, Estimator: est}
	}
	welds := shapley(gradattr.EstimatorRegression)
	welds.Superpixels = 64
	return []perturbCase{
		{"shapley-pumps", "Shapley exact, pumps (8 features, K=100)", "demo:pumps", shapley(gradattr.EstimatorExact)},
		{"shapley-mlp12", "Shapley exact, mlp-12 (12 features, K=100)", bench.MLP12.Name, shapley(gradattr.EstimatorExact)},
		{"shapley-welds", "Shapley regression N=2048, welds, 64 superpixels (K=32)", "demo:welds", welds},
	}
}

func lookupPerturbCase(name string) (perturbCase, error) {
	for _, c := range perturbCases() {
		if c.name == name {
			return c, nil
		}
	}
	return perturbCase{}, fmt.Errorf("no forward-only case %q", name)
}

// modelPath is the ONNX file of a case's model, for the PyTorch side,
// relative to the repository root (where compare runs).
func (c perturbCase) modelPath(dir string) string {
	if s, ok := strings.CutPrefix(c.model, "demo:"); ok {
		return filepath.Join("demo", "data", s+".onnx")
	}
	return filepath.Join(dir, c.model+".onnx")
}

// perturbRun is a case made ready on the Go side: the model compiled
// through the explain package as a program would (one call may split its
// batch over GOMAXPROCS goroutines), the sample and the reference set.
type perturbRun struct {
	head gradattr.Model
	x    []float64
	opts gradattr.Options
}

func (s *goSide) perturb(name string) (*perturbRun, error) {
	if r, ok := s.perturbs[name]; ok {
		return r, nil
	}
	c, err := lookupPerturbCase(name)
	if err != nil {
		return nil, err
	}
	var raw []byte
	var sample, ref []byte
	var sampleFile, refFile string
	if sc, ok := strings.CutPrefix(c.model, "demo:"); ok {
		d, err := demo.Get(sc)
		if err != nil {
			return nil, err
		}
		raw, sample, sampleFile, ref, refFile = d.Model, d.Sample, d.SampleFile, d.Reference, d.ReferenceFile
	}
	var m *explain.Model
	if raw != nil {
		m, err = explain.Decode(raw, c.model, explain.DecodeOptions{})
	} else {
		m, err = explain.ReadModel(c.modelPath(s.dir))
	}
	if err != nil {
		return nil, err
	}
	if err := m.Compile(explain.CompileOptions{Parallel: runtime.GOMAXPROCS(0)}); err != nil {
		return nil, err
	}
	head, err := m.Head("", false)
	if err != nil {
		return nil, err
	}
	r := &perturbRun{head: head, opts: c.opts}
	if raw != nil {
		spec, err := m.Input()
		if err != nil {
			return nil, err
		}
		xs, err := samples.Read(bytes.NewReader(sample), sampleFile, spec, m.ReadOptions(false))
		if err != nil {
			return nil, err
		}
		rs, err := samples.Read(bytes.NewReader(ref), refFile, spec, m.ReadOptions(false))
		if err != nil {
			return nil, err
		}
		r.x, r.opts.Reference = xs.Sample(0), rs.Rows()
	} else {
		spec, err := bench.Lookup(c.model)
		if err != nil {
			return nil, err
		}
		rows := bench.Input(spec, 101)
		size := len(rows) / 101
		r.x = rows[:size]
		for i := 1; i <= 100; i++ {
			r.opts.Reference = append(r.opts.Reference, rows[i*size:(i+1)*size])
		}
	}
	s.perturbs[name] = r
	return r, nil
}

// timePerturb runs a case iters times after one warm-up call and returns
// the seconds, the model rows of one call and the allocations per call.
func (s *goSide) timePerturb(name string, iters int) (response, error) {
	r, err := s.perturb(name)
	if err != nil {
		return response{}, err
	}
	ctx := context.Background()
	res, err := gradattr.Attribute(ctx, r.head, r.x, gradattr.TargetTop, r.opts)
	if err != nil {
		return response{}, err
	}
	if !res.Completeness.OK {
		return response{}, fmt.Errorf("%s: efficiency check failed: %+v", name, *res.Completeness)
	}
	out, err := timeCalls(iters, func() error {
		_, err := gradattr.Attribute(ctx, r.head, r.x, gradattr.TargetTop, r.opts)
		return err
	})
	out.Rows = res.Cost.ForwardPasses
	return out, err
}

// forwardRows returns the outputs of n rows of bench.Input for a case's
// model, for the agreement check before timing.
func (s *goSide) forwardRows(name string, n int) (response, error) {
	r, err := s.perturb(name)
	if err != nil {
		return response{}, err
	}
	size := len(r.x)
	x := bench.Input(bench.Spec{Input: []int{size}}, n)
	out, err := r.head.Forward(context.Background(), x, n)
	if err != nil {
		return response{}, err
	}
	return response{Out: out}, nil
}

// perturbRow is one measured line of the forward-only table.
type perturbRow struct {
	label    string
	threads  int
	rows     int
	goSec    float64
	torchSec float64 // 0 without PyTorch
	allocs   float64
	bytes    float64
}

func (r perturbRow) ratio() string {
	if r.torchSec == 0 {
		return "-"
	}
	return fmt.Sprintf("%.2f", r.goSec/r.torchSec)
}

// measurePerturb times case c on both sides, alternating, reps times,
// after checking that the two sides compute the same outputs.
func measurePerturb(gp, tp *peer, dir string, c perturbCase, reps int, target float64) (perturbRow, string, error) {
	check := ""
	if tp != nil {
		g, err := gp.call(request{Cmd: "forward", Task: c.name, N: 4})
		if err != nil {
			return perturbRow{}, "", fmt.Errorf("go side: %w", err)
		}
		t, err := tp.call(request{Cmd: "forward", Path: c.modelPath(dir), N: 4})
		if err != nil {
			return perturbRow{}, "", fmt.Errorf("torch side: %w", err)
		}
		d, scale, err := maxDiff(g.Out, t.Out)
		if err != nil {
			return perturbRow{}, "", err
		}
		if d > 1e-5*max(scale, 1) {
			return perturbRow{}, "", fmt.Errorf("%s: outputs differ by %.3g (scale %.3g)", c.model, d, scale)
		}
		check = fmt.Sprintf("%s: outputs of 4 rows agree within 1e-5: max |Δ| %.2g (scale %.2g)", c.model, d, scale)
	}
	one, err := gp.call(request{Cmd: "perturb", Task: c.name, Iters: 1})
	if err != nil {
		return perturbRow{}, "", fmt.Errorf("go side: %w", err)
	}
	row := perturbRow{label: c.label, rows: one.Rows}
	gi := max(1, int(target/max(one.Seconds, 1e-7)))
	ti := 0
	if tp != nil {
		t, err := tp.call(request{Cmd: "rows", Path: c.modelPath(dir), Rows: row.rows, Batch: gradattr.DefaultForwardBatch, Iters: 1})
		if err != nil {
			return perturbRow{}, "", fmt.Errorf("torch side: %w", err)
		}
		ti = max(1, int(target/max(t.Seconds, 1e-7)))
	}
	var gs, ts, allocs, byts []float64
	for i := 0; i < reps; i++ {
		if tp != nil {
			time.Sleep(settle)
		}
		g, err := gp.call(request{Cmd: "perturb", Task: c.name, Iters: gi})
		if err != nil {
			return perturbRow{}, "", fmt.Errorf("go side: %w", err)
		}
		gs, allocs, byts = append(gs, g.Seconds/float64(gi)), append(allocs, g.Allocs), append(byts, g.Bytes)
		if tp != nil {
			time.Sleep(settle)
			t, err := tp.call(request{Cmd: "rows", Path: c.modelPath(dir), Rows: row.rows, Batch: gradattr.DefaultForwardBatch, Iters: ti})
			if err != nil {
				return perturbRow{}, "", fmt.Errorf("torch side: %w", err)
			}
			ts = append(ts, t.Seconds/float64(ti))
		}
	}
	row.goSec, row.allocs, row.bytes = median(gs), median(allocs), median(byts)
	if tp != nil {
		row.torchSec = median(ts)
	}
	return row, check, nil
}

func formatPerturbRow(r perturbRow) string {
	return fmt.Sprintf("%-58s %d %9d %12s %12s %7s %12.0f", r.label, r.threads, r.rows, human(r.goSec), human(r.torchSec), r.ratio(), float64(r.rows)/r.goSec)
}

func renderPerturbTable(rows []perturbRow) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%-58s %s %9s %12s %12s %7s %12s\n", "forward-only method", "T", "rows", "apportion", "torch fwd", "ratio", "rows/s")
	for _, r := range rows {
		b.WriteString(formatPerturbRow(r) + "\n")
	}
	return b.String()
}

func renderPerturbMarkdown(rows []perturbRow, checks []string) string {
	var b strings.Builder
	b.WriteString("## Forward-only methods\n\n")
	b.WriteString("Shapley values need only forward passes. The apportion column times the whole call (gradattr.Attribute: reference rows, coalition rows, the model calls in batches of 512, the estimator); the torch column times only PyTorch's forward passes over the same number of rows, in batches of 512 under `torch.no_grad()`, so the ratio compares the whole method with the bare model cost on the other engine. Rows counts the model rows of one call.\n\n")
	for _, c := range checks {
		fmt.Fprintf(&b, "- %s\n", c)
	}
	if len(checks) > 0 {
		b.WriteString("\n")
	}
	b.WriteString("| method | T | rows | apportion | torch forward | ratio | rows/s (apportion) | allocs/call | KiB/call |\n|---|---|---|---|---|---|---|---|---|\n")
	for _, r := range rows {
		fmt.Fprintf(&b, "| %s | %d | %d | %s | %s | %s | %.0f | %.0f | %.1f |\n", r.label, r.threads, r.rows, human(r.goSec), human(r.torchSec), r.ratio(), float64(r.rows)/r.goSec, r.allocs, r.bytes/1024)
	}
	b.WriteString("\n")
	return b.String()
}
