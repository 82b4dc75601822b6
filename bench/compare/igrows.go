package main

import (
	"fmt"
	"strings"
)

// igRow is one "IG to 0.1%" line: apportion's integrated gradients to 0.1%
// (how it integrated, its error against the float64 exact integral) and
// PyTorch's trapezoid rule at the smallest doubling of its point count that
// reaches 0.1%.
type igRow struct {
	model           string
	pieces          int // of the float64 exact integral
	how             string
	goErr           float64
	torchPoints     int
	torchErr        float64
	goSec, torchSec float64
}

func (r igRow) ratio() float64 { return r.goSec / r.torchSec }

// measureIG computes the case's reference, PyTorch's point count, and
// times both sides.
func measureIG(gp, tp *peer, name string, reps int, target float64) (igRow, error) {
	ref, err := gp.call(request{Cmd: "igref", Model: name})
	if err != nil {
		return igRow{}, fmt.Errorf("go side: %w", err)
	}
	r := igRow{model: name, pieces: ref.Pieces, how: ref.How, goErr: ref.IGError}
	greq := request{Cmd: "time", Model: name, Task: "igtol"}
	if tp == nil {
		t, err := timeSides(gp, &greq, nil, nil, reps, target)
		r.goSec = t.goSec
		return r, err
	}
	sw, err := tp.call(request{Cmd: "igsweep", Path: ref.Path, X: ref.X, Target: ref.Target, Ref: ref.IG})
	if err != nil {
		return r, fmt.Errorf("torch side: %w", err)
	}
	r.torchPoints, r.torchErr = sw.Points, sw.IGError
	treq := request{Cmd: "time", Task: "igtol", Path: ref.Path, X: ref.X, Target: ref.Target, Points: sw.Points}
	t, err := timeSides(gp, &greq, tp, &treq, reps, target)
	r.goSec, r.torchSec = t.goSec, t.otherSec
	return r, err
}

func formatIGRow(r igRow) string {
	return fmt.Sprintf("%-6s IG to 0.1%% %-30s err %.1e  %12s | torch %5d points err %.1e %12s  ratio %.2f",
		r.model, r.how, r.goErr, human(r.goSec), r.torchPoints, r.torchErr, human(r.torchSec), r.ratio())
}

func renderIG(rows []igRow) string {
	var b strings.Builder
	for _, r := range rows {
		b.WriteString(formatIGRow(r) + "\n")
	}
	return b.String()
}

func igMarkdown(rows []igRow) string {
	if len(rows) == 0 {
		return ""
	}
	var b strings.Builder
	b.WriteString("\n## Integrated gradients to 0.1%\n\n")
	b.WriteString("One sample (bench.Input's first for the zoo, the demo's sample), the zero baseline, the top output, one thread. The reference is the exact integral in float64 (nn's float64 engine, gradattr.ExactAlways; Sotoudeh & Thakur 2019), kept in igref.json beside the models. apportion runs integrated gradients with its defaults and `Tolerance: 0.001`: exact where the path has at most 1024 pieces (it gives up as soon as one layer's crossings show more: on the CNNs, at the first ReLU), otherwise the trapezoid rule refined adaptively (bisecting the intervals where the gradient changes most) until the completeness gap and its estimate of the relative L1 error are within 0.1%; the estimate is shown beside the points. PyTorch runs the trapezoid rule in batched passes of 256 points at the smallest of 2, 4, 8, …, 65536 points whose attributions are within 0.1% relative L1 of the reference. Errors are relative L1 against the reference.\n\n")
	b.WriteString("| model | pieces (float64) | apportion | error | time | PyTorch points | error | time | ratio |\n|---|---|---|---|---|---|---|---|---|\n")
	worst := 0.0
	for _, r := range rows {
		fmt.Fprintf(&b, "| %s | %d | %s | %.1e | %s | %d | %.1e | %s | %.2f |\n", r.model, r.pieces, r.how, r.goErr, human(r.goSec), r.torchPoints, r.torchErr, human(r.torchSec), r.ratio())
		worst = max(worst, r.ratio())
	}
	fmt.Fprintf(&b, "\nWorst ratio apportion/PyTorch for IG to 0.1%%: %.2f.\n", worst)
	return b.String()
}
