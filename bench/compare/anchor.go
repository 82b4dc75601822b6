package main

import (
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"

	"github.com/apportion/apportion/bench"
)

// The forward-pass anchor times predict (Head.Forward) beside ONNX Runtime
// (npm onnxruntime-node, bench/ort_side.js, timed inside node over many
// calls) at batch 1, 64 and 1024, the same input on both sides.
var anchorBatches = []int{1, 64, 1024}

// anchorRow is one forward-anchor line.
type anchorRow struct {
	model          string
	batch, threads int
	goSec, ortSec  float64
}

func (r anchorRow) ratio() float64 { return r.goSec / r.ortSec }

// startORT starts the node side, or says why it cannot.
func startORT(cfg config) (*peer, error) {
	node, err := exec.LookPath(cfg.node)
	if err != nil {
		return nil, fmt.Errorf("node: %w", err)
	}
	env := os.Environ()
	if cfg.ortModules != "" {
		env = append(env, "NODE_PATH="+cfg.ortModules)
	}
	return startPeer(node, []string{cfg.ortSide}, env)
}

// probeORT returns ONNX Runtime's version, or why the anchor cannot run.
func probeORT(cfg config) (string, error) {
	p, err := startORT(cfg)
	if err != nil {
		return "", err
	}
	defer p.close()
	r, err := p.call(request{Cmd: "info"})
	if err != nil {
		return "", err
	}
	if r.ORT == "" {
		return "", errors.New("no version from " + cfg.ortSide)
	}
	return r.ORT, nil
}

// anchor times the forward anchor of one zoo model at threads threads (the
// Go side's GOMAXPROCS, ONNX Runtime's intra-op threads).
func anchor(cfg config, gp *peer, s bench.Spec, threads int, target float64) ([]anchorRow, error) {
	op, err := startORT(cfg)
	if err != nil {
		return nil, err
	}
	defer op.close()
	path, err := filepath.Abs(filepath.Join(cfg.dir, s.Name+".onnx"))
	if err != nil {
		return nil, err
	}
	var rows []anchorRow
	for _, b := range anchorBatches {
		greq := request{Cmd: "time", Model: s.Name, Task: "forward", Samples: b}
		oreq := request{Cmd: "time", Path: path, Shape: s.Input, Batch: b, Threads: threads}
		t, err := timeSides(gp, &greq, op, &oreq, cfg.reps, target)
		if err != nil {
			return nil, err
		}
		r := anchorRow{model: s.Name, batch: b, threads: threads, goSec: t.goSec, ortSec: t.otherSec}
		fmt.Fprintf(os.Stderr, "%-6s forward ×%-5d %d  %12s %12s %7.2f (ONNX Runtime)\n", r.model, r.batch, r.threads, human(r.goSec), human(r.ortSec), r.ratio())
		rows = append(rows, r)
	}
	return rows, nil
}

func renderAnchors(rows []anchorRow) string {
	if len(rows) == 0 {
		return "forward anchor: - (ONNX Runtime not available)\n"
	}
	var b strings.Builder
	fmt.Fprintf(&b, "%-6s %-14s %s  %12s %12s %7s\n", "model", "forward", "T", "apportion", "onnxruntime", "ratio")
	for _, r := range rows {
		fmt.Fprintf(&b, "%-6s batch %-8d %d  %12s %12s %7.2f\n", r.model, r.batch, r.threads, human(r.goSec), human(r.ortSec), r.ratio())
	}
	return b.String()
}

func anchorMarkdown(rows []anchorRow, version string, ortErr error) string {
	var b strings.Builder
	b.WriteString("\n## Forward pass against ONNX Runtime\n\n")
	if ortErr != nil {
		fmt.Fprintf(&b, "Not measured: ONNX Runtime was not usable (%v).\n", ortErr)
		return b.String()
	}
	fmt.Fprintf(&b, "ONNX Runtime %s (npm onnxruntime-node, bench/ort_side.js: one InferenceSession per model and thread count, intra-op threads = T, sequential execution, all graph optimisations), timed inside node over many calls; apportion's predict is Head.Forward on the same batch (element i is 0.5·sin(0.37·i + 0.1)). Medians of alternating repetitions.\n\n", version)
	b.WriteString("| model | batch | T | apportion | ONNX Runtime | ratio |\n|---|---|---|---|---|---|\n")
	for _, r := range rows {
		fmt.Fprintf(&b, "| %s | %d | %d | %s | %s | %.2f |\n", r.model, r.batch, r.threads, human(r.goSec), human(r.ortSec), r.ratio())
	}
	worst := 0.0
	for _, r := range rows {
		if r.batch == 1024 && r.threads == 1 && r.ratio() > worst {
			worst = r.ratio()
		}
	}
	fmt.Fprintf(&b, "\nWorst one-thread ratio at batch 1024: %.2f.\n", worst)
	return b.String()
}
