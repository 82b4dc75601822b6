package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"strconv"
	"sync"
	"time"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// server is the state shared by the HTTP handlers: one decoded and compiled
// model, its reference set, the worker pool and the metrics.
type server struct {
	cfg       serveConfig
	log       *slog.Logger
	model     *explain.Model
	spec      samples.Spec     // the model's runtime input
	reference *explain.Dataset // nil without one
	inspect   []byte           // the /v1/model document
	pool      *workPool
	metrics   *serveMetrics

	mu       sync.Mutex
	heads    map[bool]gradattr.Model // by Selection.Logits
	batchers []*batcher
}

// newServer loads and compiles the model of cfg and starts the workers.
func newServer(cfg serveConfig, log *slog.Logger) (*server, error) {
	s := &server{cfg: cfg, log: log, heads: map[bool]gradattr.Model{}, metrics: newServeMetrics()}
	l, err := loadModel(cfg.modelPath, "")
	if err != nil {
		return nil, err
	}
	m := l.model
	if s.spec, err = m.Input(); err != nil {
		return nil, err
	}
	if _, ok := s.spec.FixedSample(); !ok {
		return nil, fmt.Errorf("serving needs a model whose input %q has a fixed shape per sample, got %s", s.spec.Name, samples.ShapeString(s.spec.Shape))
	}
	if err := m.Compile(explain.CompileOptions{Parallel: 1}); err != nil {
		return nil, err
	}
	s.model = m
	s.pool = newWorkPool(cfg.workers, cfg.queue, s.metrics)
	started := false
	defer func() {
		if !started {
			s.Close()
		}
	}()
	if _, err := s.head(false); err != nil {
		return nil, err
	}
	if err := s.loadReference(l.demo); err != nil {
		return nil, err
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetIndent("", "  ") // as inspect -format json
	if err := enc.Encode(m.Describe()); err != nil {
		return nil, err
	}
	s.inspect = buf.Bytes()
	started = true
	return s, nil
}

// loadReference reads -reference, or the demo's reference set when serving
// the demo model.
func (s *server) loadReference(dm *demoFiles) error {
	name, raw := s.cfg.reference, []byte(nil)
	var err error
	switch {
	case name != "":
		if raw, err = samples.ReadLimited(name); err != nil {
			return fmt.Errorf("-reference: input %s (for %q): %w", name, s.spec.Name, err)
		}
	case dm != nil && dm.reference != nil:
		name, raw = dm.referenceFile, dm.reference
	default:
		return nil
	}
	b, err := samples.Read(bytes.NewReader(raw), name, s.spec, s.model.ReadOptions(false))
	if err != nil {
		if s.cfg.reference != "" {
			return fmt.Errorf("-reference: %w", err)
		}
		return fmt.Errorf("demo reference: %w", err)
	}
	if s.cfg.reference == "" {
		name = "demo:" + name
	}
	if got, want := b.SampleSize(), samples.Product(s.sampleShape()); got != want {
		return fmt.Errorf("reference %s: expected samples of %d values, got %d", name, want, got)
	}
	s.reference = explain.NewDataset(name, raw, b)
	return nil
}

func (s *server) sampleShape() []int {
	ps, _ := s.spec.FixedSample()
	return ps
}

// head returns the explained output of the model (the logits before its
// final Softmax with logits set), counted and, with -coalesce, stacked.
func (s *server) head(logits bool) (gradattr.Model, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if h, ok := s.heads[logits]; ok {
		return h, nil
	}
	h, err := s.model.Head("", logits)
	if err != nil {
		return nil, err
	}
	var m gradattr.Model = &countingModel{m: h, metrics: s.metrics}
	if s.cfg.coalesce {
		b := newBatcher(m, s.cfg.runners, coalesceMaxPoints, coalesceWindow, s.pool.Active, s.metrics)
		s.batchers = append(s.batchers, b)
		m = b
	}
	s.heads[logits] = m
	return m, nil
}

// Close stops the workers and the pass runners. Call it after Serve has
// returned.
func (s *server) Close() {
	s.pool.Close()
	s.mu.Lock()
	defer s.mu.Unlock()
	for _, b := range s.batchers {
		b.Close()
	}
	s.batchers = nil
	s.heads = map[bool]gradattr.Model{}
}

// Passes is the number of model passes (Forward and Gradient calls that
// reached the network) since the server started.
func (s *server) Passes() int64 { return s.metrics.passCount.Load() }

// Handler returns the server's routes.
func (s *server) Handler() http.Handler {
	mux := http.NewServeMux()
	mux.Handle("/healthz", s.route("/healthz", http.MethodGet, s.healthz))
	mux.Handle("/v1/model", s.route("/v1/model", http.MethodGet, s.describe))
	mux.Handle("/v1/predict", s.route("/v1/predict", http.MethodPost, s.predict))
	mux.Handle("/v1/explain", s.route("/v1/explain", http.MethodPost, s.explain))
	mux.Handle("/metrics", s.route("/metrics", http.MethodGet, s.metrics.handler()))
	mux.Handle("/", s.route("other", "", func(w http.ResponseWriter, r *http.Request, _ *requestLog) {
		writeError(w, &httpError{http.StatusNotFound, fmt.Sprintf("no route %s; the routes are /healthz, /v1/model, /v1/predict, /v1/explain and /metrics", r.URL.Path)})
	}))
	return mux
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
	Error string `json:"error"`
}

func writeError(w http.ResponseWriter, e *httpError) {
	if sw, ok := w.(*statusWriter); ok {
		sw.errMsg = e.msg
	}
	if e.code == http.StatusServiceUnavailable {
		w.Header().Set("Retry-After", strconv.Itoa(defaultRetryAfter))
	}
	writeJSONBody(w, e.code, errorJSON{e.msg})
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
	points       int
	completeness string // ok, failed, not judged; "" when none applies
}

// statusWriter records the status a handler wrote.
type statusWriter struct {
	http.ResponseWriter
	code   int
	errMsg string
}

func (w *statusWriter) WriteHeader(code int) {
	if w.code == 0 {
		w.code = code
	}
	w.ResponseWriter.WriteHeader(code)
}

func (w *statusWriter) Write(b []byte) (int, error) {
	if w.code == 0 {
		w.code = http.StatusOK
	}
	return w.ResponseWriter.Write(b)
}

// handlerFunc is a route's handler; it fills rl for the request log.
type handlerFunc func(w http.ResponseWriter, r *http.Request, rl *requestLog)

// route wraps h with the method check, the metrics and the request log.
func (s *server) route(name, method string, h handlerFunc) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		sw := &statusWriter{ResponseWriter: w}
		rl := &requestLog{}
		if method != "" && r.Method != method && !(method == http.MethodGet && r.Method == http.MethodHead) {
			sw.Header().Set("Allow", method)
			writeError(sw, &httpError{http.StatusMethodNotAllowed, fmt.Sprintf("%s takes %s, got %s", name, method, r.Method)})
		} else {
			h(sw, r, rl)
		}
		d := time.Since(start)
		code := strconv.Itoa(sw.code)
		if sw.code == 0 {
			code = "canceled" // the client went away before an answer
		}
		s.metrics.requests.WithLabelValues(name, code).Inc()
		s.metrics.latency.WithLabelValues(name).Observe(d.Seconds())
		if rl.method != "" && sw.code == http.StatusOK {
			s.metrics.explainLatency.WithLabelValues(rl.method).Observe(d.Seconds())
		}
		attrs := []slog.Attr{
			slog.String("route", name), slog.String("http_method", r.Method), slog.String("status", code),
			slog.Float64("duration_ms", float64(d.Microseconds())/1000),
		}
		if rl.method != "" {
			attrs = append(attrs, slog.String("method", rl.method), slog.Int("samples", rl.samples),
				slog.Int("points", rl.points), slog.String("completeness", rl.completeness))
		}
		if sw.errMsg != "" {
			attrs = append(attrs, slog.String("error", sw.errMsg))
		}
		s.log.LogAttrs(context.Background(), slog.LevelInfo, "request", attrs...)
	})
}

func (s *server) healthz(w http.ResponseWriter, r *http.Request, _ *requestLog) {
	writeJSONBody(w, http.StatusOK, map[string]string{"status": "ok", "model": s.model.Name})
}

func (s *server) describe(w http.ResponseWriter, r *http.Request, _ *requestLog) {
	writeRaw(w, http.StatusOK, s.inspect)
}

// readBody reads the request body, refusing one over -max-body: from
// Content-Length when the client sent it, before reading anything, and
// otherwise once the limit is crossed.
func (s *server) readBody(w http.ResponseWriter, r *http.Request) ([]byte, *httpError) {
	limit := s.cfg.maxBody
	if r.ContentLength > limit {
		return nil, &httpError{http.StatusRequestEntityTooLarge,
			fmt.Sprintf("request body of %d bytes is over the limit of %d bytes (%s)", r.ContentLength, limit, formatBytes(limit))}
	}
	raw, err := io.ReadAll(http.MaxBytesReader(w, r.Body, limit))
	if err != nil {
		var mb *http.MaxBytesError
		if errors.As(err, &mb) {
			return nil, &httpError{http.StatusRequestEntityTooLarge,
				fmt.Sprintf("request body is over the limit of %d bytes (%s)", limit, formatBytes(limit))}
		}
		return nil, badRequest("reading the request body: %v", err)
	}
	return raw, nil
}

// decodeRequest decodes raw into v, refusing unknown fields and data after
// the object. Bare NaN and Infinity tokens, which some encoders write but
// JSON does not have, get a message of their own.
func decodeRequest(raw []byte, v any) *httpError {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.DisallowUnknownFields()
	err := dec.Decode(v)
	if err == nil {
		if _, terr := dec.Token(); terr != io.EOF {
			return badRequest("malformed JSON: expected one object, got more data after it")
		}
		return nil
	}
	var se *json.SyntaxError
	if errors.As(err, &se) && se.Offset > 0 && int(se.Offset) <= len(raw) {
		rest := raw[se.Offset-1:]
		for _, tok := range []string{"NaN", "Infinity"} {
			if bytes.HasPrefix(rest, []byte(tok)) {
				return badRequest("%s at byte %d: expected finite numbers, got a value that is not a finite number (JSON has no NaN or Infinity, and a model cannot be explained at one)", tok, se.Offset)
			}
		}
	}
	if errors.Is(err, io.EOF) {
		return badRequest("malformed JSON: expected an object, got an empty body")
	}
	return badRequest("malformed JSON: %v", err)
}

// samplesOf reads the "inputs" field: one sample or an array of samples of
// the model's input shape, finite numbers only.
func (s *server) samplesOf(inputs json.RawMessage) (*samples.Batch, *httpError) {
	if len(bytes.TrimSpace(inputs)) == 0 || string(bytes.TrimSpace(inputs)) == "null" {
		return nil, badRequest(`"inputs" is required: an array of samples of shape %s`, samples.ShapeString(s.sampleShape()))
	}
	b, err := samples.ReadJSON(bytes.NewReader(inputs), s.spec)
	if err == nil {
		err = b.CheckFinite()
	}
	if err != nil {
		return nil, badRequest(`"inputs" (for %q): %v`, s.spec.Name, err)
	}
	if got, want := b.SampleSize(), samples.Product(s.sampleShape()); got != want {
		return nil, badRequest(`"inputs" (for %q): expected samples of shape %s (%d values), got %s (%d values)`,
			s.spec.Name, samples.ShapeString(s.sampleShape()), want, samples.ShapeString(b.SampleShape()), got)
	}
	b.Name = "request"
	return b, nil
}

// run computes f on a worker under the request's time limit. It answers
// 503 when the queue is full and 504 past the limit; f's own error is
// returned as it is. finished reports that f has returned (or will never
// run), so that what it wrote may be read.
func (s *server) run(r *http.Request, f func(ctx context.Context) *httpError) (herr *httpError, finished bool) {
	ctx, cancel := context.WithTimeout(r.Context(), s.cfg.timeout)
	defer cancel() // stops the work of a request that is given up
	var ferr *httpError
	j := &job{ctx: ctx, done: make(chan struct{})}
	j.run = func(ctx context.Context) {
		defer func() {
			if p := recover(); p != nil {
				ferr = &httpError{http.StatusInternalServerError, fmt.Sprintf("internal error: %v", p)}
			}
		}()
		ferr = f(ctx)
	}
	if err := s.pool.submit(j); err != nil {
		return &httpError{http.StatusServiceUnavailable,
			fmt.Sprintf("the server is busy: %d requests are waiting for %d workers; retry after %d s", s.cfg.queue, s.cfg.workers, defaultRetryAfter)}, true
	}
	select {
	case <-j.done:
		if j.skipped {
			return s.ctxError(ctx), true
		}
		return ferr, true
	case <-ctx.Done():
		return s.ctxError(ctx), false
	}
}

// errGone marks a request whose client went away; nothing is written.
var errGone = &httpError{0, "the client closed the request"}

func (s *server) ctxError(ctx context.Context) *httpError {
	if errors.Is(ctx.Err(), context.DeadlineExceeded) {
		return &httpError{http.StatusGatewayTimeout, fmt.Sprintf("the request did not finish within the server's time limit of %v", s.cfg.timeout)}
	}
	return errGone
}

func (s *server) finish(w http.ResponseWriter, herr *httpError) {
	if herr != nil && herr != errGone {
		writeError(w, herr)
	}
}

// predictRequest is the body of POST /v1/predict.
type predictRequest struct {
	Inputs json.RawMessage `json:"inputs"`
}

func (s *server) predict(w http.ResponseWriter, r *http.Request, rl *requestLog) {
	raw, herr := s.readBody(w, r)
	if herr != nil {
		s.finish(w, herr)
		return
	}
	var req predictRequest
	if herr := decodeRequest(raw, &req); herr != nil {
		s.finish(w, herr)
		return
	}
	b, herr := s.samplesOf(req.Inputs)
	if herr != nil {
		s.finish(w, herr)
		return
	}
	t, err := b.ToTensor(s.spec)
	if err != nil {
		s.finish(w, badRequest("%v", err))
		return
	}
	var body []byte
	herr, _ = s.run(r, func(ctx context.Context) *httpError {
		s.metrics.countPass("forward", b.Samples)
		res, err := s.model.Predict(ctx, []*onnxlite.Tensor{t})
		if err != nil {
			if ctx.Err() != nil {
				return s.ctxError(ctx)
			}
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		var buf bytes.Buffer
		if err := json.NewEncoder(&buf).Encode(res); err != nil {
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		body = buf.Bytes()
		return nil
	})
	if herr != nil {
		s.finish(w, herr)
		return
	}
	writeRaw(w, http.StatusOK, body)
}

// explainRequest is the body of POST /v1/explain. Absent fields take the
// defaults of the explain command's flags; "baseline" takes zero, mean (of
// the server's reference set, else of "inputs"), blur or blur:S.
type explainRequest struct {
	Inputs    json.RawMessage `json:"inputs"`
	Method    *string         `json:"method"`
	Target    json.RawMessage `json:"target"` // an index, or "top"
	Steps     json.RawMessage `json:"steps"`  // a count, or "auto"
	Rule      *string         `json:"rule"`
	Tolerance *float64        `json:"tolerance"`
	Baseline  *string         `json:"baseline"`
	Samples   *int            `json:"samples"`
	Noise     *float64        `json:"noise"`
	Seed      *uint64         `json:"seed"`
	Logits    *bool           `json:"logits"`
}

// fieldName names a setting as a request field: "steps".
func fieldName(f explain.Field) string { return strconv.Quote(string(f)) }

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
// defaults, as the explain command's flags do. The reference set is the
// server's: expected gradients draw from it and the mean baseline averages
// it (without one, the mean baseline averages "inputs").
func (s *server) settings(req *explainRequest) (explain.Settings, *httpError) {
	st := explain.Defaults()
	target, herr := intOrWord("target", req.Target, explain.DefaultTargetText, "top")
	if herr != nil {
		return st, herr
	}
	steps, herr := intOrWord("steps", req.Steps, explain.DefaultStepsText, "auto")
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
		return st, badRequest(`"baseline" must be zero, mean, blur or blur:S, got %q`, *req.Baseline)
	}
	if st.NeedsReference() {
		st.Reference = s.reference
		if st.Reference == nil && !st.Method.Reads(gradattr.ParamBaseline) {
			return st, badRequest(`"method" %s needs a reference set; this server has none (start it with -reference FILE)`, st.Method)
		}
	}
	if err := st.Check(); err != nil {
		return st, settingsError(err)
	}
	return st, nil
}

// intOrWord reads a field that holds a non-negative integer or one word.
func intOrWord(name string, raw json.RawMessage, def, word string) (string, *httpError) {
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
	return "", badRequest("%q must be a number or %q, got %s", name, word, raw)
}

func (s *server) explain(w http.ResponseWriter, r *http.Request, rl *requestLog) {
	raw, herr := s.readBody(w, r)
	if herr != nil {
		s.finish(w, herr)
		return
	}
	var req explainRequest
	if herr := decodeRequest(raw, &req); herr != nil {
		s.finish(w, herr)
		return
	}
	st, herr := s.settings(&req)
	if herr != nil {
		s.finish(w, herr)
		return
	}
	rl.method = st.Method.String()
	b, herr := s.samplesOf(req.Inputs)
	if herr != nil {
		s.finish(w, herr)
		return
	}
	rl.samples = b.Samples
	head, err := s.head(st.Logits)
	if err != nil {
		s.finish(w, badRequest(`"logits": %v`, err))
		return
	}
	ex, err := explain.New(s.model, head, st)
	if err != nil {
		s.finish(w, settingsError(err))
		return
	}
	var body []byte
	var got requestLog // written by the worker, read once it has finished
	herr, finished := s.run(r, func(ctx context.Context) *httpError {
		rep, err := ex.Explain(ctx, b, nil)
		if err != nil {
			var fe *explain.FieldError
			if errors.As(err, &fe) {
				return settingsError(err)
			}
			return &httpError{http.StatusInternalServerError, err.Error()}
		}
		if herr := s.judge(ctx, rep, &got); herr != nil {
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
		s.finish(w, herr)
		return
	}
	writeRaw(w, http.StatusOK, body)
}

// judge fills the request log and the completeness metric from rep. It
// returns 504 when the time limit cut the work, and 400 when every sample
// failed on a bad request (a target out of range, say); otherwise the
// document is answered, failed samples carrying their "error".
func (s *server) judge(ctx context.Context, rep *explain.Report, rl *requestLog) *httpError {
	var bad error
	failedBad, judged, failed, unjudged := 0, 0, 0, 0
	for _, e := range rep.Explanations {
		if e.Err != nil {
			if ctx.Err() != nil {
				return s.ctxError(ctx)
			}
			if errors.Is(e.Err, gradattr.ErrInput) || errors.Is(e.Err, gradattr.ErrOptions) || errors.Is(e.Err, samples.ErrNonFinite) {
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
			s.metrics.incomplete.WithLabelValues(rep.Settings.Method.String()).Inc()
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
