// Package httpapi serves one model over HTTP: an http.Handler for the /v1
// API, to mount in one's own mux or serve as it is.
//
//	GET  /healthz      liveness: {"status": "ok", "model": name}
//	GET  /v1/model     the model's description (explain.Description)
//	POST /v1/predict   {"inputs": [sample, ...]}: the predict document
//	POST /v1/explain   {"inputs", "method", "target", "steps", "rule",
//	                   "tolerance", "baseline", "samples", "noise", "seed",
//	                   "logits", "abs", "variant", "reference_rows",
//	                   "estimator", "coalitions", "kernel_width", "window",
//	                   "stride", "superpixels", "compactness", "patch"}: the
//	                   explain document; absent fields take explain.Defaults
//	GET  /metrics      Prometheus text format
//
// A sample in "inputs" is an array of numbers in the model's input shape,
// or, for a model whose metadata names its features, an object of the
// features' values by name ({"bearing_temp": 77.2, ...}; every feature
// given, no other key).
//
// Errors are {"error": "...", "request_id": "..."}: 400 for a bad request,
// 408 for a body that does not arrive within the time limit, 413 for a
// body, a number of samples or a cost over the limits, 503 with
// Retry-After when the queue is full, 504 past the time limit. Every answer
// carries X-Request-ID: the client's own, or one made for the request,
// which the request's log line gives too. A bounded pool of workers
// computes requests; with coalescing, the
// model passes of concurrent requests are stacked into shared batches.
package httpapi

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"net"
	"net/http"
	"os"
	"reflect"
	"runtime"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/samples"
)

// Defaults of Options, and the serve command's.
const (
	// DefaultMaxBody is the largest request body, in bytes.
	DefaultMaxBody = 8 << 20
	// DefaultMaxSamples is the most samples one request may hold.
	DefaultMaxSamples = 256
	// DefaultMaxWork is the most model evaluations one request may cost
	// (see Options.MaxWork): DefaultMaxSamples samples explained with
	// integrated gradients at automatic points under any rule fit in it.
	DefaultMaxWork = 1 << 22
	// DefaultSmallWork is the most work of a small request (see
	// Options.SmallWork): 16 samples of integrated gradients at automatic
	// points.
	DefaultSmallWork = 1 << 16
	// DefaultTimeout bounds one request from its arrival: reading its body,
	// queueing and computing.
	DefaultTimeout = 30 * time.Second
	// DefaultQueue is the serve command's queue length.
	DefaultQueue = 64
	// DefaultCoalesce is whether the serve command stacks the passes of
	// concurrent requests (DEVELOPERS.md has the measurements behind it).
	DefaultCoalesce = true
	// DefaultDrain is how long Serve waits for requests in flight when it
	// stops.
	DefaultDrain = 10 * time.Second
	// retryAfter is the Retry-After of a 503, in seconds.
	retryAfter = 1
	// coalesceFanIn is the number of requests computed at once per pass
	// runner when coalescing: their model calls wait for a runner together,
	// so that a runner can stack them into one pass.
	coalesceFanIn = 4
)

// Options configure a Handler. The zero value means: bodies up to
// DefaultMaxBody of up to DefaultMaxSamples samples costing up to
// DefaultMaxWork, DefaultTimeout per request, GOMAXPROCS workers, no queue
// (a request that finds every worker busy gets 503), no coalescing, no
// reference set, no request log.
type Options struct {
	// MaxBody is the largest request body, in bytes; 0 means
	// DefaultMaxBody. It is decided from Content-Length when the client
	// sends it.
	MaxBody int64
	// MaxSamples is the most samples one request may hold; 0 means
	// DefaultMaxSamples. A request with more gets 413, decided as soon as
	// the sample past the limit is reached.
	MaxSamples int
	// MaxWork is the most work one request may cost: the samples it sends
	// through the model, forward and gradient passes alike, counted before
	// any pass from its samples and settings as their most
	// (explain.Explainer.Work: integrated gradients at automatic points
	// count every refinement up to the largest point count); 0 means
	// DefaultMaxWork. A request over it gets 413 with its cost and the
	// budget.
	MaxWork int
	// SmallWork is the most work of a small request; 0 means
	// DefaultSmallWork. Heavier requests hold at most three quarters of
	// the workers and of the cores (at least one), so that small requests
	// always find a worker, and with Coalesce the model passes of small
	// requests are run first.
	SmallWork int
	// Timeout bounds one request from its arrival, reading its body,
	// queueing and computing included; 0 means DefaultTimeout. A body
	// still arriving when it passes gets 408; a request past it otherwise
	// gets 504 and stops at its next model pass.
	Timeout time.Duration
	// Workers is the number of requests computed at once; 0 means
	// GOMAXPROCS, times 4 with Coalesce (so that passes meet).
	Workers int
	// Queue is the number of requests that may wait for a worker.
	Queue int
	// Coalesce stacks the model passes of concurrent requests into shared
	// batches, run by GOMAXPROCS (at most Workers) pass runners. A
	// sample's results do not depend on its batch, so answers are the
	// same.
	Coalesce bool
	// Reference is the reference set: expected gradients draw from it and
	// the mean baseline averages it (without one, the mean baseline
	// averages the request's inputs).
	Reference *explain.Dataset
	// Logger gets one line per request; nil logs nothing.
	Logger *slog.Logger
	// DType is the engine's element type: nn.Float32 (the zero value) or
	// nn.Float64.
	DType nn.DType
}

// Handler serves the /v1 API for one model. It is safe for concurrent use;
// Close stops its workers.
type Handler struct {
	opt       Options
	runners   int // passes run at once (coalescing only)
	log       *slog.Logger
	model     *explain.Model
	spec      samples.Spec // the model's runtime input
	inspect   []byte       // the /v1/model document
	pool      *workPool
	metrics   *metrics
	mux       *http.ServeMux
	mu        sync.Mutex
	heads     map[bool]gradattr.Model // by Selection.Logits
	batchers  []*batcher
	closeOnce sync.Once
}

// New compiles m for serving (one goroutine per call: the concurrency
// comes from requests) and starts the workers. The model must have one
// runtime input of a fixed shape per sample.
func New(m *explain.Model, opt Options) (*Handler, error) {
	procs := runtime.GOMAXPROCS(0)
	switch {
	case opt.MaxBody < 0 || opt.MaxSamples < 0 || opt.MaxWork < 0 || opt.Timeout < 0 || opt.Workers < 0 || opt.Queue < 0:
		return nil, fmt.Errorf("httpapi: negative limits: max body %d, max samples %d, max work %d, timeout %v, workers %d, queue %d",
			opt.MaxBody, opt.MaxSamples, opt.MaxWork, opt.Timeout, opt.Workers, opt.Queue)
	}
	if opt.MaxWork == 0 {
		opt.MaxWork = DefaultMaxWork
	}
	if opt.SmallWork <= 0 {
		opt.SmallWork = DefaultSmallWork
	}
	if opt.MaxBody == 0 {
		opt.MaxBody = DefaultMaxBody
	}
	if opt.MaxSamples == 0 {
		opt.MaxSamples = DefaultMaxSamples
	}
	if opt.Timeout == 0 {
		opt.Timeout = DefaultTimeout
	}
	if opt.Workers == 0 {
		opt.Workers = procs
		if opt.Coalesce {
			opt.Workers = procs * coalesceFanIn
		}
	}
	h := &Handler{opt: opt, runners: min(procs, opt.Workers), model: m, log: opt.Logger,
		heads: map[bool]gradattr.Model{}, metrics: newMetrics()}
	if h.log == nil {
		h.log = slog.New(slog.DiscardHandler)
	}
	var err error
	if h.spec, err = m.Input(); err != nil {
		return nil, err
	}
	if _, ok := h.spec.FixedSample(); !ok {
		return nil, fmt.Errorf("serving needs a model whose input %q has a fixed shape per sample, got %s", h.spec.Name, samples.ShapeString(h.spec.Shape))
	}
	if ref := opt.Reference; ref != nil {
		if ref.Batch == nil {
			return nil, fmt.Errorf("reference %s: the samples are not read", ref.Name)
		}
		if got, want := ref.Batch.SampleSize(), samples.Product(h.sampleShape()); got != want {
			return nil, fmt.Errorf("reference %s: expected samples of %d values, got %d", ref.Name, want, got)
		}
	}
	if err := m.Compile(explain.CompileOptions{Parallel: 1, DType: opt.DType}); err != nil {
		return nil, err
	}
	h.pool = newWorkPool(opt.Workers, opt.Queue, h.metrics)
	started := false
	defer func() {
		if !started {
			h.Close()
		}
	}()
	if _, err := h.head(false); err != nil {
		return nil, err
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetIndent("", "  ") // as inspect -format json
	if err := enc.Encode(m.Describe()); err != nil {
		return nil, err
	}
	h.inspect = buf.Bytes()
	h.routes()
	started = true
	return h, nil
}

func (h *Handler) sampleShape() []int {
	ps, _ := h.spec.FixedSample()
	return ps
}

// head returns the explained output of the model (the logits before its
// final Softmax with logits set), counted and, with coalescing, stacked.
func (h *Handler) head(logits bool) (gradattr.Model, error) {
	h.mu.Lock()
	defer h.mu.Unlock()
	if m, ok := h.heads[logits]; ok {
		return m, nil
	}
	hd, err := h.model.Head("", logits)
	if err != nil {
		return nil, err
	}
	var m gradattr.Model = &countingModel{m: hd, metrics: h.metrics}
	if h.opt.Coalesce {
		b := newBatcher(m, h.runners, coalesceMaxPoints, coalesceWindow, h.pool.Active, h.metrics)
		h.batchers = append(h.batchers, b)
		m = b
	}
	h.heads[logits] = m
	return m, nil
}

// Close stops the workers and the pass runners, after the requests
// queued. Call it once no more requests come (after Serve has returned).
func (h *Handler) Close() {
	h.closeOnce.Do(func() {
		h.pool.Close()
		h.mu.Lock()
		defer h.mu.Unlock()
		for _, b := range h.batchers {
			b.Close()
		}
		h.batchers = nil
		h.heads = map[bool]gradattr.Model{}
	})
}

// ServeHTTP answers one request.
func (h *Handler) ServeHTTP(w http.ResponseWriter, r *http.Request) { h.mux.ServeHTTP(w, r) }

func (h *Handler) routes() {
	mux := http.NewServeMux()
	mux.Handle("/healthz", h.route("/healthz", http.MethodGet, h.healthz))
	mux.Handle("/v1/model", h.route("/v1/model", http.MethodGet, h.describe))
	mux.Handle("/v1/predict", h.route("/v1/predict", http.MethodPost, h.predict))
	mux.Handle("/v1/explain", h.route("/v1/explain", http.MethodPost, h.explain))
	mux.Handle("/metrics", h.route("/metrics", http.MethodGet, h.metrics.handler()))
	mux.Handle("/", h.route("other", "", func(w http.ResponseWriter, r *http.Request, _ *requestLog) {
		writeError(w, &httpError{http.StatusNotFound, fmt.Sprintf("no route %s; the routes are /healthz, /v1/model, /v1/predict, /v1/explain and /metrics", r.URL.Path)})
	}))
	h.mux = mux
}

// Serve answers requests on ln with h until ctx ends, then shuts down
// gracefully: it stops accepting connections and waits up to drain for the
// requests in flight (http.Server.Shutdown), after which it closes the
// remaining connections. Errors of the server, not of requests, go to
// log.
func Serve(ctx context.Context, ln net.Listener, h http.Handler, drain time.Duration, log *slog.Logger) error {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	hs := &http.Server{
		Handler:           h,
		ReadHeaderTimeout: 10 * time.Second,
		ErrorLog:          slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
	errc := make(chan error, 1)
	go func() { errc <- hs.Serve(ln) }()
	select {
	case err := <-errc:
		return err
	case <-ctx.Done():
	}
	log.Info("shutting down", "drain", drain.String())
	sctx, cancel := context.WithTimeout(context.Background(), drain)
	defer cancel()
	err := hs.Shutdown(sctx)
	if err != nil {
		log.Warn("drain time over; closing the remaining connections", "error", err.Error())
		hs.Close()
	}
	if serr := <-errc; serr != nil && !errors.Is(serr, http.ErrServerClosed) {
		return serr
	}
	if errors.Is(err, context.DeadlineExceeded) {
		return nil // reported above; the remaining requests were cut
	}
	return err
}

// httpError is a failed request: its status and message.
type httpError struct {
	code int
	msg  string
}

func (e *httpError) Error() string { return e.msg }

func badRequest(format string, a ...any) *httpError {
	return &httpError{http.StatusBadRequest, fmt.Sprintf(format, a...)}
}

// errorJSON is the body of every error response.
type errorJSON struct {
	Error     string `json:"error"`
	RequestID string `json:"request_id,omitempty"`
}

func writeError(w http.ResponseWriter, e *httpError) {
	body := errorJSON{Error: e.msg}
	if sw, ok := w.(*statusWriter); ok {
		sw.errMsg = e.msg
		body.RequestID = sw.id
	}
	if e.code == http.StatusServiceUnavailable {
		w.Header().Set("Retry-After", strconv.Itoa(retryAfter))
	}
	writeJSONBody(w, e.code, body)
}

// requestIDHeader carries a request's ID both ways.
const requestIDHeader = "X-Request-ID"

// requestID returns the client's request ID when it is one (1 to 128
// printable ASCII characters without spaces), and otherwise a new one: 16
// random bytes in hex.
func requestID(given string) string {
	ok := len(given) > 0 && len(given) <= 128
	for i := 0; ok && i < len(given); i++ {
		ok = given[i] > ' ' && given[i] < 0x7f
	}
	if ok {
		return given
	}
	var b [16]byte
	rand.Read(b[:])
	return hex.EncodeToString(b[:])
}

func writeJSONBody(w http.ResponseWriter, code int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		code, b = http.StatusInternalServerError, []byte(`{"error":"encoding the response failed"}`)
	}
	writeRaw(w, code, append(b, '\n'))
}

func writeRaw(w http.ResponseWriter, code int, b []byte) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Content-Length", strconv.Itoa(len(b)))
	w.WriteHeader(code)
	w.Write(b)
}

// requestLog collects what a handler reports about one request.
type requestLog struct {
	method       string // attribution method
	samples      int
	work         int // the request's cost in model evaluations, its most
	points       int
	completeness string // ok, failed, not judged; "" when none applies
}

// statusWriter records the status a handler wrote, and the request's ID.
type statusWriter struct {
	http.ResponseWriter
	code   int
	errMsg string
	id     string
}

func (w *statusWriter) WriteHeader(code int) {
	if w.code == 0 {
		w.code = code
	}
	w.ResponseWriter.WriteHeader(code)
}

// Unwrap gives http.ResponseController the connection's writer.
func (w *statusWriter) Unwrap() http.ResponseWriter { return w.ResponseWriter }

func (w *statusWriter) Write(b []byte) (int, error) {
	if w.code == 0 {
		w.code = http.StatusOK
	}
	return w.ResponseWriter.Write(b)
}

// handlerFunc is a route's handler; it fills rl for the request log.
type handlerFunc func(w http.ResponseWriter, r *http.Request, rl *requestLog)

// route wraps h with the method check, the metrics and the request log.
func (h *Handler) route(name, method string, fn handlerFunc) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		sw := &statusWriter{ResponseWriter: w, id: requestID(r.Header.Get(requestIDHeader))}
		sw.Header().Set(requestIDHeader, sw.id)
		rl := &requestLog{}
		// The time limit covers the whole request, from here: reading and
		// parsing the body too, whose reads fail once it has passed.
		deadline := start.Add(h.opt.Timeout)
		ctx, cancel := context.WithDeadline(r.Context(), deadline)
		defer cancel()
		r = r.WithContext(ctx)
		_ = http.NewResponseController(sw).SetReadDeadline(deadline) // not every ResponseWriter has one
		if method != "" && r.Method != method && !(method == http.MethodGet && r.Method == http.MethodHead) {
			sw.Header().Set("Allow", method)
			writeError(sw, &httpError{http.StatusMethodNotAllowed, fmt.Sprintf("%s takes %s, got %s", name, method, r.Method)})
		} else {
			fn(sw, r, rl)
		}
		d := time.Since(start)
		code := strconv.Itoa(sw.code)
		if sw.code == 0 {
			code = "canceled" // the client went away before an answer
		}
		h.metrics.requests.WithLabelValues(name, code).Inc()
		h.metrics.latency.WithLabelValues(name).Observe(d.Seconds())
		if rl.method != "" && sw.code == http.StatusOK {
			h.metrics.explainLatency.WithLabelValues(rl.method).Observe(d.Seconds())
		}
		attrs := []slog.Attr{
			slog.String("route", name), slog.String("request_id", sw.id), slog.String("http_method", r.Method), slog.String("status", code),
			slog.Float64("duration_ms", float64(d.Microseconds())/1000),
		}
		if rl.method != "" {
			attrs = append(attrs, slog.String("method", rl.method), slog.Int("samples", rl.samples),
				slog.Int("work", rl.work), slog.Int("points", rl.points), slog.String("completeness", rl.completeness))
		}
		if sw.errMsg != "" {
			attrs = append(attrs, slog.String("error", sw.errMsg))
		}
		h.log.LogAttrs(context.Background(), slog.LevelInfo, "request", attrs...)
	})
}

func (h *Handler) healthz(w http.ResponseWriter, r *http.Request, _ *requestLog) {
	writeJSONBody(w, http.StatusOK, map[string]string{"status": "ok", "model": h.model.Name})
}

func (h *Handler) describe(w http.ResponseWriter, r *http.Request, _ *requestLog) {
	writeRaw(w, http.StatusOK, h.inspect)
}

// readBody reads the request body, refusing one over Options.MaxBody: from
// Content-Length when the client sent it, before reading anything, and
// otherwise once the limit is crossed.
func (h *Handler) readBody(w http.ResponseWriter, r *http.Request) ([]byte, *httpError) {
	limit := h.opt.MaxBody
	if r.ContentLength > limit {
		return nil, &httpError{http.StatusRequestEntityTooLarge,
			fmt.Sprintf("request body of %d bytes is over the limit of %d bytes (%s)", r.ContentLength, limit, FormatBytes(limit))}
	}
	// Read into one buffer of the announced size (bytes.MinRead over it,
	// so that reading to the end does not grow it), not by doubling.
	buf := bytes.NewBuffer(make([]byte, 0, max(r.ContentLength, 0)+bytes.MinRead))
	_, err := buf.ReadFrom(http.MaxBytesReader(w, r.Body, limit))
	raw := buf.Bytes()
	if err != nil {
		var mb *http.MaxBytesError
		var ne net.Error
		switch {
		case errors.As(err, &mb):
			return nil, &httpError{http.StatusRequestEntityTooLarge,
				fmt.Sprintf("request body is over the limit of %d bytes (%s)", limit, FormatBytes(limit))}
		case errors.Is(err, os.ErrDeadlineExceeded), errors.As(err, &ne) && ne.Timeout(), r.Context().Err() != nil:
			return nil, &httpError{http.StatusRequestTimeout,
				fmt.Sprintf("the request body did not arrive within the server's time limit of %v", h.opt.Timeout)}
		}
		return nil, badRequest("reading the request body: %v", err)
	}
	return raw, nil
}

// readRequest reads the request body (see readBody) and decodes it into v
// (see decodeRequest).
func (h *Handler) readRequest(w http.ResponseWriter, r *http.Request, v any) *httpError {
	raw, herr := h.readBody(w, r)
	if herr != nil {
		return herr
	}
	return decodeRequest(raw, v)
}

// decodeRequest decodes raw, a JSON object, into v, a pointer to a struct
// whose fields have json tags, refusing unknown fields and data after the
// object. The object is split into its fields once, with no copy of the
// body beyond their values, and each field is decoded into its own;
// a field of the wrong type is named with what it takes. Bare NaN and
// Infinity tokens, which some encoders write but JSON does not have, get a
// message of their own.
func decodeRequest(raw []byte, v any) *httpError {
	if len(bytes.TrimSpace(raw)) == 0 {
		return badRequest("malformed JSON: expected an object, got an empty body")
	}
	var fields map[string]json.RawMessage
	if err := json.Unmarshal(raw, &fields); err != nil {
		var se *json.SyntaxError
		var te *json.UnmarshalTypeError
		switch {
		case errors.As(err, &se) && strings.Contains(se.Error(), "after top-level value"):
			return badRequest("malformed JSON: expected one object, got more data after it")
		case errors.As(err, &se) && se.Offset > 0 && int(se.Offset) <= len(raw):
			rest := raw[se.Offset-1:]
			for _, tok := range []string{"NaN", "Infinity"} {
				if bytes.HasPrefix(rest, []byte(tok)) {
					return badRequest("%s at byte %d: expected finite numbers, got a value that is not a finite number (JSON has no NaN or Infinity, and a model cannot be explained at one)", tok, se.Offset)
				}
			}
		case errors.As(err, &te):
			return badRequest("malformed JSON: expected an object, got %s", jsonKind(te.Value))
		}
		return badRequest("malformed JSON: %v", err)
	}
	st := reflect.ValueOf(v).Elem()
	known := map[string]int{}
	for i := range st.NumField() {
		name, _, _ := strings.Cut(st.Type().Field(i).Tag.Get("json"), ",")
		known[name] = i
	}
	names := make([]string, 0, len(fields))
	for name := range fields {
		names = append(names, name)
	}
	sort.Strings(names)
	for _, name := range names {
		i, ok := known[name]
		if !ok {
			return badRequest("malformed JSON: unknown field %q", name)
		}
		f := st.Field(i)
		if err := json.Unmarshal(fields[name], f.Addr().Interface()); err != nil {
			return badRequest("%q must be %s, got %s", name, typeWords(f.Type()), fields[name])
		}
	}
	return nil
}

// jsonKind names the kind of JSON value encoding/json reports.
func jsonKind(kind string) string {
	switch kind {
	case "array", "object":
		return "an " + kind
	case "number", "string":
		return "a " + kind
	case "bool":
		return "true or false"
	}
	return kind
}

// typeWords says what a request field of type t takes.
func typeWords(t reflect.Type) string {
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	switch t.Kind() {
	case reflect.String:
		return "a string"
	case reflect.Bool:
		return "true or false"
	case reflect.Int, reflect.Int64:
		return "an integer"
	case reflect.Uint, reflect.Uint64:
		return "a non-negative integer"
	case reflect.Float64:
		return "a number"
	}
	return "a JSON value"
}

// tooManySamples is the error of a request of more than MaxSamples samples.
func (h *Handler) tooManySamples() *httpError {
	return &httpError{http.StatusRequestEntityTooLarge,
		fmt.Sprintf(`"inputs" holds more than the %s one request may have; send them in several requests`, count(h.opt.MaxSamples, "sample"))}
}

// samplesOf reads the "inputs" field: one sample or an array of samples of
// the model's input shape, finite numbers only, at most Options.MaxSamples
// of them (the reading stops at the sample past the limit); a sample is an
// array of numbers, or an object of its features' values by name (see
// namedInputs). In an array of samples of a fully known shape a sample
// that cannot be read is marked bad in the batch (Batch.Bad) and the
// others are kept; otherwise the first sample that cannot be read is the
// error.
func (h *Handler) samplesOf(inputs json.RawMessage) (*samples.Batch, *httpError) {
	if len(bytes.TrimSpace(inputs)) == 0 || string(bytes.TrimSpace(inputs)) == "null" {
		return nil, badRequest(`"inputs" is required: an array of samples of shape %s`, samples.ShapeString(h.sampleShape()))
	}
	if b, ok, herr := h.namedInputs(inputs); ok {
		return b, herr
	}
	if b, ok, herr := h.textInputs(inputs); ok {
		return b, herr
	}
	read := func(keepBad bool) (*samples.Batch, error) {
		s, err := samples.NewStream(bytes.NewReader(inputs), "inputs.json", h.spec, samples.Options{MaxSamples: h.opt.MaxSamples, KeepBad: keepBad})
		if err != nil {
			return nil, err
		}
		return s.All()
	}
	b, err := read(true)
	if err != nil && !errors.Is(err, samples.ErrTooMany) {
		// No sample could be read: a strict read words why, naming the
		// first bad sample.
		_, err = read(false)
	}
	if errors.Is(err, samples.ErrTooMany) {
		return nil, h.tooManySamples()
	}
	if fe := (*samples.FileError)(nil); errors.As(err, &fe) {
		err = fe.Err
	}
	if err != nil {
		return nil, badRequest(`"inputs" (for %q): %v`, h.spec.Name, err)
	}
	if got, want := b.SampleSize(), samples.Product(h.sampleShape()); got != want {
		return nil, badRequest(`"inputs" (for %q): expected samples of shape %s (%d values), got %s (%d values)`,
			h.spec.Name, samples.ShapeString(h.sampleShape()), want, samples.ShapeString(b.SampleShape()), got)
	}
	b.Name = "request"
	return b, nil
}

// budget refuses a request whose work, for n samples, is over
// Options.MaxWork.
func (h *Handler) budget(work, n int) *httpError {
	if work <= h.opt.MaxWork {
		return nil
	}
	return &httpError{http.StatusRequestEntityTooLarge, fmt.Sprintf(
		"the request costs up to %s (%s, %d each), over this server's budget of %d per request; send fewer samples, or ask for fewer steps or samples per explanation",
		count(work, "model evaluation"), count(n, "sample"), work/max(n, 1), h.opt.MaxWork)}
}

// count writes n things: "1 sample", "3 samples".
func count(n int, thing string) string {
	if n == 1 {
		return "1 " + thing
	}
	return strconv.Itoa(n) + " " + thing + "s"
}

// run computes f on a worker under the request's time limit, as a heavy
// request when work is over Options.SmallWork. It answers 503 when the
// queue is full and 504 past the limit; f's own error is returned as it
// is. finished reports that f has returned (or will never run), so that
// what it wrote may be read.
func (h *Handler) run(r *http.Request, work int, f func(ctx context.Context) *httpError) (herr *httpError, finished bool) {
	ctx, cancel := context.WithCancel(r.Context()) // the request's time limit (see route)
	defer cancel()                                 // stops the work of a request that is given up
	heavy := work > h.opt.SmallWork
	if heavy {
		ctx = withHeavy(ctx)
	}
	var ferr *httpError
	j := &job{ctx: ctx, done: make(chan struct{}), heavy: heavy}
	j.run = func(ctx context.Context) {
		defer func() {
			if p := recover(); p != nil {
				ferr = &httpError{http.StatusInternalServerError, fmt.Sprintf("internal error: %v", p)}
			}
		}()
		ferr = f(ctx)
	}
	if err := h.pool.submit(j); err != nil {
		return &httpError{http.StatusServiceUnavailable,
			fmt.Sprintf("the server is busy: %d requests are waiting for %d workers; retry after %d s", h.opt.Queue, h.opt.Workers, retryAfter)}, true
	}
	select {
	case <-j.done:
		if j.skipped {
			return h.ctxError(ctx), true
		}
		return ferr, true
	case <-ctx.Done():
		return h.ctxError(ctx), false
	}
}

// errGone marks a request whose client went away; nothing is written.
var errGone = &httpError{0, "the client closed the request"}

func (h *Handler) ctxError(ctx context.Context) *httpError {
	if errors.Is(ctx.Err(), context.DeadlineExceeded) {
		return &httpError{http.StatusGatewayTimeout, fmt.Sprintf("the request did not finish within the server's time limit of %v", h.opt.Timeout)}
	}
	return errGone
}

func (h *Handler) finish(w http.ResponseWriter, herr *httpError) {
	if herr != nil && herr != errGone {
		writeError(w, herr)
	}
}

// predictRequest is the body of POST /v1/predict.
type predictRequest struct {
	Inputs json.RawMessage `json:"inputs"`
}

func (h *Handler) predict(w http.ResponseWriter, r *http.Request, rl *requestLog) {
	var req predictRequest
	if herr := h.readRequest(w, r, &req); herr != nil {
		h.finish(w, herr)
		return
	}
	b, herr := h.samplesOf(req.Inputs)
	if herr != nil {
		h.finish(w, herr)
		return
	}
	if herr := h.budget(b.Samples, b.Samples); herr != nil {
		h.finish(w, herr)
		return
	}
	var body []byte
	herr, _ = h.run(r, b.Samples, func(ctx context.Context) *httpError {
		h.metrics.countPass("forward", b.Samples)
		res, err := h.model.PredictSamples(ctx, b, h.spec)
		if err != nil {
			if ctx.Err() != nil {
				return h.ctxError(ctx)
			}
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		if res.Outputs == nil { // no sample could be run: the first says why
			return badRequest("sample %d: %s", res.Errors[0].Index, res.Errors[0].Error)
		}
		if len(res.Errors) == 0 {
			res.Rows = nil
		}
		var buf bytes.Buffer
		if err := json.NewEncoder(&buf).Encode(res); err != nil {
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		body = buf.Bytes()
		return nil
	})
	if herr != nil {
		h.finish(w, herr)
		return
	}
	writeRaw(w, http.StatusOK, body)
}

// explainRequest is the body of POST /v1/explain. Absent fields take
// explain.Defaults, the explain command's defaults too; "baseline" takes
// zero, mean (of the server's reference set, else of "inputs"), blur or
// blur:S.
type explainRequest struct {
	Inputs    json.RawMessage `json:"inputs"`
	Method    *string         `json:"method"`
	Target    json.RawMessage `json:"target"` // an index, or "top"
	Steps     json.RawMessage `json:"steps"`  // a count, or "auto", "exact" or "refine"
	Rule      *string         `json:"rule"`
	Tolerance *float64        `json:"tolerance"`
	Baseline  *string         `json:"baseline"`
	Samples   *int            `json:"samples"`
	Noise     *float64        `json:"noise"`
	Seed      *uint64         `json:"seed"`
	Logits    *bool           `json:"logits"`
	Abs       *bool           `json:"abs"`
	Variant   *string         `json:"variant"`

	ReferenceRows *int     `json:"reference_rows"`
	Estimator     *string  `json:"estimator"`
	Coalitions    *int     `json:"coalitions"`
	KernelWidth   *float64 `json:"kernel_width"`
	Window        *string  `json:"window"` // "HxW"
	Stride        *int     `json:"stride"`
	Superpixels   *int     `json:"superpixels"`
	Compactness   *float64 `json:"compactness"`
	Patch         *string  `json:"patch"` // "HxW"
	Layer         *string  `json:"layer"`
	// LayerBaseline is the baseline at "layer": input or zero.
	LayerBaseline *string `json:"layer_baseline"`
	// BaselineToken is a token model's baseline token id.
	BaselineToken *int `json:"baseline_token"`
}

// fieldName names a setting as a request field, in the snake case of the
// JSON documents: "steps", "reference_rows".
func fieldName(f explain.Field) string {
	return strconv.Quote(strings.ReplaceAll(string(f), "-", "_"))
}

// settingsError answers a settings error as a bad request, naming the
// request's fields.
func settingsError(err error) *httpError {
	var fe *explain.FieldError
	if errors.As(err, &fe) {
		return badRequest("%s", fe.Wording(fieldName))
	}
	return badRequest("%v", err)
}

// settings reads the request's settings: absent fields take the library's
// defaults (explain.Defaults). The reference set is the
// server's: expected gradients draw from it and the mean baseline averages
// it (without one, the mean baseline averages "inputs").
func (h *Handler) settings(req *explainRequest) (explain.Settings, *httpError) {
	st := explain.Defaults()
	target, herr := intOrWord("target", req.Target, explain.DefaultTargetText, `"top"`)
	if herr != nil {
		return st, herr
	}
	steps, herr := intOrWord("steps", req.Steps, explain.DefaultStepsText, `"auto", "exact" or "refine"`)
	if herr != nil {
		return st, herr
	}
	float := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	fields := []struct {
		f     explain.Field
		given bool
		text  func() string
	}{
		{explain.FieldMethod, req.Method != nil, func() string { return *req.Method }},
		{explain.FieldTarget, req.Target != nil, func() string { return target }},
		{explain.FieldLogits, req.Logits != nil, func() string { return strconv.FormatBool(*req.Logits) }},
		{explain.FieldBaseline, req.Baseline != nil, func() string { return *req.Baseline }},
		{explain.FieldSteps, req.Steps != nil, func() string { return steps }},
		{explain.FieldRule, req.Rule != nil, func() string { return *req.Rule }},
		{explain.FieldTolerance, req.Tolerance != nil, func() string { return float(*req.Tolerance) }},
		{explain.FieldSamples, req.Samples != nil, func() string { return strconv.Itoa(*req.Samples) }},
		{explain.FieldNoise, req.Noise != nil, func() string { return float(*req.Noise) }},
		{explain.FieldSeed, req.Seed != nil, func() string { return strconv.FormatUint(*req.Seed, 10) }},
		{explain.FieldAbs, req.Abs != nil, func() string { return strconv.FormatBool(*req.Abs) }},
		{explain.FieldVariant, req.Variant != nil, func() string { return *req.Variant }},
		{explain.FieldReferenceRows, req.ReferenceRows != nil, func() string { return strconv.Itoa(*req.ReferenceRows) }},
		{explain.FieldEstimator, req.Estimator != nil, func() string { return *req.Estimator }},
		{explain.FieldCoalitions, req.Coalitions != nil, func() string { return strconv.Itoa(*req.Coalitions) }},
		{explain.FieldKernelWidth, req.KernelWidth != nil, func() string { return float(*req.KernelWidth) }},
		{explain.FieldWindow, req.Window != nil, func() string { return *req.Window }},
		{explain.FieldStride, req.Stride != nil, func() string { return strconv.Itoa(*req.Stride) }},
		{explain.FieldSuperpixels, req.Superpixels != nil, func() string { return strconv.Itoa(*req.Superpixels) }},
		{explain.FieldCompactness, req.Compactness != nil, func() string { return float(*req.Compactness) }},
		{explain.FieldPatch, req.Patch != nil, func() string { return *req.Patch }},
		{explain.FieldLayer, req.Layer != nil, func() string { return *req.Layer }},
		{explain.FieldLayerBaseline, req.LayerBaseline != nil, func() string { return *req.LayerBaseline }},
		{explain.FieldBaselineToken, req.BaselineToken != nil, func() string { return strconv.Itoa(*req.BaselineToken) }},
	}
	for _, fl := range fields {
		if !fl.given {
			continue
		}
		if err := st.Set(fl.f, fl.text()); err != nil {
			return st, settingsError(err)
		}
	}
	if st.Baseline.Kind == gradattr.BaselineValues {
		return st, badRequest(`"baseline" must be %s (files are the command line's), got %q`, explain.BaselineWords, *req.Baseline)
	}
	if st.NeedsReference() {
		st.Reference = h.opt.Reference
		if st.Reference == nil && !st.Method.Reads(gradattr.ParamBaseline) {
			return st, badRequest(`"method" %s needs a reference set; this server has none`, st.Method)
		}
	}
	if err := st.Check(); err != nil {
		return st, settingsError(err)
	}
	return st, nil
}

// intOrWord reads a field that holds a non-negative integer or a word; words
// names them for the error message.
func intOrWord(name string, raw json.RawMessage, def, words string) (string, *httpError) {
	if raw == nil {
		return def, nil
	}
	var w string
	if json.Unmarshal(raw, &w) == nil {
		return w, nil
	}
	var n float64
	if err := json.Unmarshal(raw, &n); err == nil && n == math.Trunc(n) && math.Abs(n) < 1<<53 {
		return strconv.FormatInt(int64(n), 10), nil
	}
	return "", badRequest("%q must be a number or %s, got %s", name, words, raw)
}

func (h *Handler) explain(w http.ResponseWriter, r *http.Request, rl *requestLog) {
	var req explainRequest
	if herr := h.readRequest(w, r, &req); herr != nil {
		h.finish(w, herr)
		return
	}
	st, herr := h.settings(&req)
	if herr != nil {
		h.finish(w, herr)
		return
	}
	rl.method = st.Method.String()
	b, herr := h.samplesOf(req.Inputs)
	if herr != nil {
		h.finish(w, herr)
		return
	}
	rl.samples = b.Samples
	head, err := h.head(st.Logits)
	if err != nil {
		h.finish(w, badRequest(`"logits": %v`, err))
		return
	}
	ex, err := explain.New(h.model, head, st)
	if err != nil {
		h.finish(w, settingsError(err))
		return
	}
	work, err := ex.Work(b)
	if err != nil {
		h.finish(w, settingsError(err))
		return
	}
	rl.work = work
	if herr := h.budget(work, b.Samples); herr != nil {
		h.finish(w, herr)
		return
	}
	var body []byte
	var got requestLog // written by the worker, read once it has finished
	herr, finished := h.run(r, work, func(ctx context.Context) *httpError {
		rep, err := ex.Explain(ctx, b, nil)
		if err != nil {
			var fe *explain.FieldError
			if errors.As(err, &fe) {
				return settingsError(err)
			}
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		if herr := h.judge(ctx, rep, &got); herr != nil {
			return herr
		}
		var buf bytes.Buffer
		if err := rep.WriteJSON(&buf); err != nil {
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		body = buf.Bytes()
		return nil
	})
	if finished {
		rl.points, rl.completeness = got.points, got.completeness
	}
	if herr != nil {
		h.finish(w, herr)
		return
	}
	writeRaw(w, http.StatusOK, body)
}

// judge fills the request log and the completeness metric from rep. It
// returns 504 when the time limit cut the work, and 400 when every sample
// failed on a bad request (a target out of range, say); otherwise the
// document is answered, failed samples carrying their "error".
func (h *Handler) judge(ctx context.Context, rep *explain.Report, rl *requestLog) *httpError {
	var bad error
	failedBad, judged, failed, unjudged := 0, 0, 0, 0
	for _, e := range rep.Explanations {
		if e.Err != nil {
			if ctx.Err() != nil {
				return h.ctxError(ctx)
			}
			unread := rep.Batch != nil && rep.Batch.Bad[e.Index-rep.Batch.First] != nil
			if unread || errors.Is(e.Err, gradattr.ErrInput) || errors.Is(e.Err, gradattr.ErrOptions) || errors.Is(e.Err, samples.ErrNonFinite) || errors.Is(e.Err, nn.ErrBadRequest) {
				failedBad++
				if bad == nil {
					bad = fmt.Errorf("sample %d: %w", e.Index, e.Err)
				}
			}
			continue
		}
		rl.points += e.Result.Cost.GradientEvals
		switch cp := e.Result.Completeness; {
		case cp == nil:
		case !cp.Judged:
			unjudged++
		case cp.OK:
			judged++
		default:
			judged++
			failed++
			h.metrics.incomplete.WithLabelValues(rep.Settings.Method.String()).Inc()
		}
	}
	if failedBad > 0 && failedBad == len(rep.Explanations) {
		return badRequest("%v", bad)
	}
	switch {
	case failed > 0:
		rl.completeness = "failed"
	case judged > 0:
		rl.completeness = "ok"
	case unjudged > 0:
		rl.completeness = "not judged"
	}
	return nil
}
