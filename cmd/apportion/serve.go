package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"os"
	"os/signal"
	"runtime"
	"strconv"
	"strings"
	"syscall"
	"time"
)

// Server defaults.
const (
	defaultServeAddr  = "127.0.0.1:8080"
	defaultMaxBody    = 8 << 20
	defaultTimeout    = 30 * time.Second
	defaultQueue      = 64
	defaultDrain      = 10 * time.Second
	defaultRetryAfter = 1 // seconds
	// coalesceFanIn is the number of requests computed at once per pass
	// runner when coalescing: their model calls wait for a runner together,
	// so that a runner can stack them into one pass.
	coalesceFanIn = 4
)

// serveConfig holds serve's flags, validated.
type serveConfig struct {
	addr      string
	modelPath string
	reference string
	maxBody   int64
	timeout   time.Duration
	workers   int // requests computed at once
	runners   int // passes run at once (coalescing only)
	queue     int // requests waiting for a worker
	coalesce  bool
	drain     time.Duration
}

func runServe(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("serve", "[-addr HOST:PORT] [-model PATH] [flags]",
		"apportion serve -addr 127.0.0.1:8080 -model model.onnx -workers 4",
		"Serves the model over HTTP (the embedded pumps demo without -model):\n\n"+
			"\tGET  /healthz      liveness\n"+
			"\tGET  /v1/model     the document of inspect -format json\n"+
			"\tPOST /v1/predict   {\"inputs\": [sample, ...]}: the document of predict -format json\n"+
			"\tPOST /v1/explain   {\"inputs\": [...], \"method\", \"target\", \"steps\", \"tolerance\",\n"+
			"\t                   \"baseline\", \"samples\", \"noise\", \"seed\", \"rule\", \"logits\"}:\n"+
			"\t                   the document of explain -format json\n"+
			"\tGET  /metrics      Prometheus text format\n\n"+
			"Errors are JSON {\"error\": \"...\"}: 400 bad request, 413 body over -max-body,\n"+
			"503 queue full (with Retry-After), 504 past -timeout. SIGINT or SIGTERM stops\n"+
			"accepting connections and waits up to -drain for requests in flight.\n"+
			"One JSON log line per request goes to standard error.\n\n"+caution, stderr)
	c := serveConfig{}
	maxBody := byteSize(defaultMaxBody)
	fs.StringVar(&c.addr, "addr", defaultServeAddr, "`address` to listen on")
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default the embedded pumps demo)")
	fs.StringVar(&c.reference, "reference", "", "reference samples `file` for expected-grad and baseline mean (default the demo's reference set with the demo model)")
	fs.Var(&maxBody, "max-body", "largest request body, in `bytes` (suffixes KiB, MiB, GiB, kB, MB, GB)")
	fs.DurationVar(&c.timeout, "timeout", defaultTimeout, "time limit of one request, queueing included")
	fs.IntVar(&c.workers, "workers", 0, "`N` requests computed at once (default GOMAXPROCS, ×4 with -coalesce)")
	fs.IntVar(&c.queue, "queue", defaultQueue, "`N` requests that may wait for a worker before the server answers 503")
	fs.BoolVar(&c.coalesce, "coalesce", defaultCoalesce, "stack the model passes of concurrent requests into shared batches")
	fs.DurationVar(&c.drain, "drain", defaultDrain, "on SIGINT or SIGTERM, time to wait for requests in flight")
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	c.maxBody = int64(maxBody)
	if msg := c.validate(); msg != "" {
		return usageError(stderr, "serve", "%s", msg)
	}
	srv, err := newServer(c, slog.New(slog.NewJSONHandler(stderr, nil)))
	if err != nil {
		return failure(stderr, "serve", err)
	}
	defer srv.Close()

	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	ln, err := net.Listen("tcp", c.addr)
	if err != nil {
		return failure(stderr, "serve", err)
	}
	srv.log.Info("listening", "addr", ln.Addr().String(), "model", srv.model.Name,
		"workers", c.workers, "queue", c.queue, "coalesce", c.coalesce)
	if err := srv.Serve(ctx, ln); err != nil {
		return failure(stderr, "serve", err)
	}
	return exitOK
}

// validate fills in defaults and checks the flag values; it returns a
// message for a usage error, or "".
func (c *serveConfig) validate() string {
	procs := runtime.GOMAXPROCS(0)
	if c.workers < 0 {
		return fmt.Sprintf("-workers must be 0 (default) or more, got %d", c.workers)
	}
	c.runners = procs
	if c.workers == 0 {
		c.workers = procs
		if c.coalesce {
			c.workers = procs * coalesceFanIn
		}
	}
	if c.coalesce {
		c.runners = min(procs, c.workers)
	}
	if c.queue < 0 {
		return fmt.Sprintf("-queue must be 0 or more, got %d", c.queue)
	}
	if c.maxBody < 1 {
		return fmt.Sprintf("-max-body must be at least 1 byte, got %d", c.maxBody)
	}
	if c.timeout <= 0 {
		return fmt.Sprintf("-timeout must be positive, got %v", c.timeout)
	}
	if c.drain < 0 {
		return fmt.Sprintf("-drain must be 0 or more, got %v", c.drain)
	}
	if c.modelPath == "" && demoModel == nil && demoScenario == nil {
		return "-model is required"
	}
	return ""
}

// Serve answers requests on ln until ctx ends, then shuts down gracefully:
// it stops accepting connections and waits up to the drain time for the
// requests in flight (http.Server.Shutdown), after which it closes the
// remaining connections.
func (s *server) Serve(ctx context.Context, ln net.Listener) error {
	hs := &http.Server{
		Handler:           s.Handler(),
		ReadHeaderTimeout: 10 * time.Second,
		ErrorLog:          slog.NewLogLogger(s.log.Handler(), slog.LevelWarn),
	}
	errc := make(chan error, 1)
	go func() { errc <- hs.Serve(ln) }()
	select {
	case err := <-errc:
		return err
	case <-ctx.Done():
	}
	s.log.Info("shutting down", "drain", s.cfg.drain.String())
	sctx, cancel := context.WithTimeout(context.Background(), s.cfg.drain)
	defer cancel()
	err := hs.Shutdown(sctx)
	if err != nil {
		s.log.Warn("drain time over; closing the remaining connections", "error", err.Error())
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

// byteSize is a flag value in bytes with an optional IEC (KiB, MiB, GiB) or
// SI (kB, MB, GB) suffix (IEC 80000-13).
type byteSize int64

func (b *byteSize) String() string { return formatBytes(int64(*b)) }

func (b *byteSize) Set(s string) error {
	v, err := parseBytes(s)
	if err != nil {
		return err
	}
	*b = byteSize(v)
	return nil
}

var byteUnits = []struct {
	suffix string
	factor int64
}{
	{"GiB", 1 << 30}, {"MiB", 1 << 20}, {"KiB", 1 << 10},
	{"GB", 1e9}, {"MB", 1e6}, {"kB", 1e3}, {"KB", 1e3}, {"B", 1},
}

func parseBytes(s string) (int64, error) {
	t := strings.TrimSpace(s)
	factor := int64(1)
	for _, u := range byteUnits {
		if rest, ok := strings.CutSuffix(t, u.suffix); ok {
			t, factor = strings.TrimSpace(rest), u.factor
			break
		}
	}
	v, err := strconv.ParseFloat(t, 64)
	if err != nil || math.IsNaN(v) || v < 0 || v*float64(factor) > math.MaxInt64/2 {
		return 0, fmt.Errorf("expected a number of bytes such as 8MiB, 512KiB or 1000000, got %q", s)
	}
	return int64(v * float64(factor)), nil
}

func formatBytes(n int64) string {
	for _, u := range byteUnits[:3] {
		if n >= u.factor && n%u.factor == 0 {
			return strconv.FormatInt(n/u.factor, 10) + u.suffix
		}
	}
	return strconv.FormatInt(n, 10)
}
