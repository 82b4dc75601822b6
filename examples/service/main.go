// Command service is a small scoring service built on apportion's packages,
// meant to be copied: it loads an ONNX classifier once, shares one compiled
// network between all requests, and answers each score with the predicted
// class, its probability and the three inputs that pushed it there most,
// by integrated gradients.
//
//	go run ./examples/service -addr 127.0.0.1:8090
//	curl -s -d '{"features":[77.2,7.14,5.49,1.29,145.5,42,6277,22.7]}' 127.0.0.1:8090/score
//
// Without -model it serves the embedded pumps demo (invented condition
// monitoring of centrifugal pumps), and explains each score against the mean
// of the demo's normal pumps: a reason says how far one reading moved the
// probability of the predicted class away from a typical healthy pump. With
// -model, a model that names its features, their units and its classes in
// its metadata (see package modelmeta) gets its names used; the baseline is
// then zero, or the mean of -reference (a CSV file with one sample per row,
// its columns matched by the model's feature names when its header has
// them).
//
// The pieces, in order: onnxlite.Decode reads the model, modelmeta.Read its
// names, nn.Compile builds a network that is safe for concurrent use,
// Network.Head picks the output to explain, samples.Read reads the
// reference set and gradattr.IntegratedGradients attributes. Everything a
// request needs is in the service value; handlers keep no other state. The
// program imports only apportion's public packages, so a copy of it builds
// outside the repository.
package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"log"
	"math"
	"net/http"
	"os"
	"os/signal"
	"sort"
	"strconv"
	"syscall"
	"time"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/modelmeta"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

func main() {
	addr := flag.String("addr", "127.0.0.1:8090", "address to listen on")
	modelPath := flag.String("model", "", "ONNX classifier (default: the embedded pumps demo)")
	refPath := flag.String("reference", "", "CSV file of reference samples whose mean is the baseline (default: the demo's, with the demo model)")
	flag.Parse()

	model, reference, err := load(*modelPath, *refPath)
	if err != nil {
		log.Fatal(err)
	}
	svc, err := newService(model, reference)
	if err != nil {
		log.Fatal(err)
	}
	srv := &http.Server{Addr: *addr, Handler: svc.handler(), ReadHeaderTimeout: 10 * time.Second}

	// Stop on Ctrl-C or SIGTERM, letting requests in flight finish.
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	go func() {
		<-ctx.Done()
		shutdown, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		srv.Shutdown(shutdown)
	}()
	log.Printf("scoring on http://%s/score", *addr)
	if err := srv.ListenAndServe(); err != nil && !errors.Is(err, http.ErrServerClosed) {
		log.Fatal(err)
	}
}

// load reads the model and the reference CSV, or the embedded demo's.
func load(modelPath, refPath string) (model, reference []byte, err error) {
	if modelPath == "" {
		s, err := demo.Get(demo.Default)
		if err != nil {
			return nil, nil, err
		}
		model, reference = s.Model, s.Reference
	} else if model, err = os.ReadFile(modelPath); err != nil {
		return nil, nil, err
	}
	if refPath != "" {
		if reference, err = os.ReadFile(refPath); err != nil {
			return nil, nil, err
		}
	}
	return model, reference, nil
}

// maxBody bounds a request body; a score request is a few hundred bytes.
const maxBody = 1 << 20

// requestTimeout bounds the work of one request.
const requestTimeout = 10 * time.Second

// service holds what every request shares: the compiled network's head
// (safe for concurrent use), the names from the model's metadata and the
// integrated-gradients baseline.
type service struct {
	head     *nn.Head
	features []string
	units    []string
	classes  []string
	baseline gradattr.Baseline
}

// newService decodes and compiles an ONNX classifier with one input of one
// fixed-size sample and one output of class probabilities. reference, when
// not nil, is a CSV file of samples (an optional header row) whose mean is
// the baseline; otherwise the baseline is zero.
func newService(model, reference []byte) (*service, error) {
	m, err := onnxlite.Decode(bytes.NewReader(model), onnxlite.DecodeOptions{})
	if err != nil {
		return nil, err
	}
	nw, err := nn.Compile(m, nn.Options{})
	if err != nil {
		return nil, err
	}
	head, err := nw.Head(nn.Selection{})
	if err != nil {
		return nil, err
	}
	s := &service{head: head}
	size := 1
	for _, d := range head.InputShape() {
		size *= d
	}
	meta := modelmeta.Read(m)
	s.features = fit(meta.Features, size)
	s.units = fit(meta.Units, size)
	s.classes = fit(meta.Classes, head.OutputSize())
	for i := range s.features {
		if s.features[i] == "" {
			s.features[i] = "x[" + strconv.Itoa(i) + "]"
		}
	}
	if reference != nil {
		// Columns by the model's feature names when the file's header has
		// them, else in order.
		spec := samples.Spec{Name: "reference", Shape: []int{-1, size}, HasShape: true}
		b, err := samples.Read(bytes.NewReader(reference), "reference.csv", spec, samples.Options{Features: meta.Features})
		if err != nil {
			return nil, err
		}
		s.baseline = gradattr.Baseline{Kind: gradattr.BaselineMean, Reference: b.Rows()}
	}
	return s, nil
}

// fit returns n names: list when it has n, else n empty names.
func fit(list []string, n int) []string {
	out := make([]string, n)
	if len(list) == n {
		copy(out, list)
	}
	return out
}

// scoreRequest is the body of POST /score.
type scoreRequest struct {
	Features []float64 `json:"features"`
}

// Reason is one input's share of the score.
type Reason struct {
	Feature     string  `json:"feature"`
	Value       float64 `json:"value"`
	Unit        string  `json:"unit,omitempty"`
	Attribution float64 `json:"attribution"`
}

// Score is the answer of POST /score.
type Score struct {
	Class       string  `json:"class"`
	ClassIndex  int     `json:"class_index"`
	Probability float64 `json:"probability"`
	// BaselineProbability is the class's probability at the baseline; the
	// attributions of all features add up to Probability minus it.
	BaselineProbability float64 `json:"baseline_probability"`
	// Reasons are the three features with the largest |attribution|.
	Reasons []Reason `json:"reasons"`
	// Complete reports whether the attributions add up within 0.5%.
	Complete bool `json:"complete"`
}

func (s *service) handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("POST /score", s.score)
	return mux
}

func (s *service) score(w http.ResponseWriter, r *http.Request) {
	var req scoreRequest
	dec := json.NewDecoder(http.MaxBytesReader(w, r.Body, maxBody))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&req); err != nil {
		writeError(w, http.StatusBadRequest, fmt.Sprintf("expected {\"features\": [numbers]}: %v", err))
		return
	}
	if len(req.Features) != len(s.features) {
		writeError(w, http.StatusBadRequest, fmt.Sprintf("expected %d features, got %d", len(s.features), len(req.Features)))
		return
	}
	ctx, cancel := context.WithTimeout(r.Context(), requestTimeout)
	defer cancel()
	res, err := s.explain(ctx, req.Features)
	switch {
	case errors.Is(err, gradattr.ErrInput):
		writeError(w, http.StatusBadRequest, err.Error())
		return
	case errors.Is(err, context.DeadlineExceeded):
		writeError(w, http.StatusGatewayTimeout, err.Error())
		return
	case err != nil:
		writeError(w, http.StatusInternalServerError, err.Error())
		return
	}
	writeJSON(w, http.StatusOK, res)
}

// explain scores x and finds its three strongest reasons.
func (s *service) explain(ctx context.Context, x []float64) (*Score, error) {
	// Integrated gradients of the top class (Sundararajan et al. 2017):
	// automatic point count, refined until the attributions add up to
	// f(x) − f(baseline) within 0.5%, at most 1025 points.
	res, err := gradattr.IntegratedGradients(ctx, s.head, x, gradattr.TargetTop, gradattr.IGOptions{
		Baselines: []gradattr.Baseline{s.baseline},
		MaxPoints: 1025,
	})
	if err != nil {
		return nil, err
	}
	sc := &Score{
		ClassIndex:          res.Target,
		Class:               strconv.Itoa(res.Target),
		Probability:         res.Output,
		BaselineProbability: res.BaselineOutput,
		Complete:            res.Completeness != nil && res.Completeness.OK,
	}
	if c := s.classes[res.Target]; c != "" {
		sc.Class = c
	}
	order := make([]int, len(x))
	for i := range order {
		order[i] = i
	}
	sort.SliceStable(order, func(a, b int) bool {
		return math.Abs(res.Attributions[order[a]]) > math.Abs(res.Attributions[order[b]])
	})
	for _, i := range order[:min(3, len(order))] {
		sc.Reasons = append(sc.Reasons, Reason{Feature: s.features[i], Value: x[i], Unit: s.units[i], Attribution: res.Attributions[i]})
	}
	return sc, nil
}

func writeError(w http.ResponseWriter, code int, msg string) {
	writeJSON(w, code, map[string]string{"error": msg})
}

func writeJSON(w http.ResponseWriter, code int, v any) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	json.NewEncoder(w).Encode(v) // an error here means the client left
}
