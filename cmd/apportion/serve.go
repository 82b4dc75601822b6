package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/httpapi"
)

// defaultServeAddr is where serve listens without -addr: this machine only.
const defaultServeAddr = "127.0.0.1:8080"

// serveConfig holds serve's flags, validated.
type serveConfig struct {
	addr       string
	modelPath  string
	reference  string
	maxBody    int64
	maxSamples int
	maxWork    int
	timeout    time.Duration
	workers    int // requests computed at once; 0: the handler's default
	queue      int // requests waiting for a worker
	coalesce   bool
	drain      time.Duration
	precision  string
	vocab      string
}

func runServe(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("serve", "[-addr HOST:PORT] [-model PATH] [flags]",
		"apportion serve -addr 127.0.0.1:8080 -model model.onnx -workers 4",
		"Serves the model over HTTP (the embedded pumps demo without -model):\n\n"+
			"\tGET  /healthz      liveness\n"+
			"\tGET  /v1/model     the document of inspect -format json\n"+
			"\tPOST /v1/predict   {\"inputs\": [sample, ...]}: the document of predict -format json\n"+
			"\t                   (a sample: an array of numbers, an object of feature values\n"+
			"\t                   by name, or for a model of token ids a text)\n"+
			"\tPOST /v1/explain   {\"inputs\": [...], \"method\", \"target\", \"steps\", \"tolerance\",\n"+
			"\t                   \"baseline\", \"samples\", \"noise\", \"seed\", \"rule\", \"logits\",\n"+
			"\t                   \"abs\", \"variant\"}:\n"+
			"\t                   the document of explain -format json\n"+
			"\tGET  /metrics      Prometheus text format\n\n"+
			"Errors are JSON {\"error\": \"...\", \"request_id\": \"...\"}: 400 bad request, 408 body not\n"+
			"in within -timeout, 413 body over -max-body, more samples than -max-samples or\n"+
			"work over -max-work, 503 queue full (with Retry-After), 504 past -timeout.\n"+
			"The work of a request is the samples it sends through the model, counted\n"+
			"before any of it runs (integrated gradients at automatic points count every\n"+
			"refinement up to 4097 points). Every answer carries X-Request-ID: the client's\n"+
			"own, or a new one. SIGINT or SIGTERM stops accepting connections and waits\n"+
			"up to -drain for requests in flight. One JSON log line per request goes to\n"+
			"standard error.\n\n"+caution, stderr)
	c := serveConfig{}
	maxBody := byteSize(httpapi.DefaultMaxBody)
	fs.StringVar(&c.addr, "addr", defaultServeAddr, "`address` to listen on")
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default the embedded pumps demo)")
	fs.StringVar(&c.reference, "reference", "", "reference samples `file` for expected-grad and baseline mean (default the demo's reference set with the demo model)")
	fs.StringVar(&c.vocab, "vocab", "", "vocabulary `file` of a model of token ids, one token per line (id = line number from 0), for texts in \"inputs\" and token names (default: the model's own, from its metadata)")
	fs.Var(&maxBody, "max-body", "largest request body, in `bytes` (suffixes KiB, MiB, GiB, kB, MB, GB)")
	fs.IntVar(&c.maxSamples, "max-samples", httpapi.DefaultMaxSamples, "most samples `N` in one request")
	fs.IntVar(&c.maxWork, "max-work", httpapi.DefaultMaxWork, "most work `N` of one request: samples sent through the model, forward and gradient passes alike")
	fs.DurationVar(&c.timeout, "timeout", httpapi.DefaultTimeout, "time limit of one request from its arrival, reading its body and queueing included")
	fs.IntVar(&c.workers, "workers", 0, "`N` requests computed at once (default GOMAXPROCS, ×4 with -coalesce)")
	fs.IntVar(&c.queue, "queue", httpapi.DefaultQueue, "`N` requests that may wait for a worker before the server answers 503")
	fs.BoolVar(&c.coalesce, "coalesce", httpapi.DefaultCoalesce, "stack the model passes of concurrent requests into shared batches")
	fs.DurationVar(&c.drain, "drain", httpapi.DefaultDrain, "on SIGINT or SIGTERM, time to wait for requests in flight")
	registerPrecisionFlag(fs, &c.precision)
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	c.maxBody = int64(maxBody)
	if msg := c.validate(); msg != "" {
		return usageError(stderr, "serve", "%s", msg)
	}
	log := slog.New(slog.NewJSONHandler(stderr, nil))
	h, name, err := newHandler(c, log)
	if err != nil {
		return failure(stderr, "serve", err)
	}
	defer h.Close()

	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	ln, err := net.Listen("tcp", c.addr)
	if err != nil {
		return failure(stderr, "serve", err)
	}
	log.Info("listening", "addr", ln.Addr().String(), "model", name,
		"workers", c.workers, "queue", c.queue, "coalesce", c.coalesce)
	if err := httpapi.Serve(ctx, ln, h, c.drain, log); err != nil {
		return failure(stderr, "serve", err)
	}
	return exitOK
}

// validate checks the flag values; it returns a message for a usage
// error, or "".
func (c *serveConfig) validate() string {
	if c.workers < 0 {
		return fmt.Sprintf("-workers must be 0 (default) or more, got %d", c.workers)
	}
	if c.queue < 0 {
		return fmt.Sprintf("-queue must be 0 or more, got %d", c.queue)
	}
	if c.maxBody < 1 {
		return fmt.Sprintf("-max-body must be at least 1 byte, got %d", c.maxBody)
	}
	if c.maxSamples < 1 {
		return fmt.Sprintf("-max-samples must be at least 1, got %d", c.maxSamples)
	}
	if c.maxWork < 1 {
		return fmt.Sprintf("-max-work must be at least 1, got %d", c.maxWork)
	}
	if c.timeout <= 0 {
		return fmt.Sprintf("-timeout must be positive, got %v", c.timeout)
	}
	if c.drain < 0 {
		return fmt.Sprintf("-drain must be 0 or more, got %v", c.drain)
	}
	if _, err := explain.ParsePrecision(c.precision); err != nil {
		return "-" + err.Error()
	}
	return ""
}

// newHandler reads the model of c (or the embedded demo) and its reference
// set (-reference, or the demo's with the demo model), and returns the
// handler and the model's name.
func newHandler(c serveConfig, log *slog.Logger) (*httpapi.Handler, string, error) {
	l, err := loadModel(c.modelPath, "")
	if err != nil {
		return nil, "", err
	}
	m := l.model
	if err := readVocabulary(m, c.vocab); err != nil {
		return nil, "", err
	}
	dtype, err := explain.ParsePrecision(c.precision)
	if err != nil {
		return nil, "", err
	}
	opt := httpapi.Options{
		MaxBody: c.maxBody, MaxSamples: c.maxSamples, MaxWork: c.maxWork, Timeout: c.timeout, Workers: c.workers, Queue: c.queue,
		Coalesce: c.coalesce, Logger: log, DType: dtype,
	}
	if opt.Reference, err = l.reference(c.reference); err != nil {
		return nil, "", err
	}
	h, err := httpapi.New(m, opt)
	return h, m.Name, err
}

// byteSize is a flag value in bytes with an optional IEC (KiB, MiB, GiB) or
// SI (kB, MB, GB) suffix (IEC 80000-13).
type byteSize int64

func (b *byteSize) String() string { return httpapi.FormatBytes(int64(*b)) }

func (b *byteSize) Set(s string) error {
	v, err := httpapi.ParseBytes(s)
	if err != nil {
		return err
	}
	*b = byteSize(v)
	return nil
}
