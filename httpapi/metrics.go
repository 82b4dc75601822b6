package httpapi

import (
	"context"
	"errors"
	"net/http"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/apportion/apportion/gradattr"
)

// metrics are the server's Prometheus metrics, in a registry of its
// own (so that several servers, in tests, do not share counters).
type metrics struct {
	reg            *prometheus.Registry
	requests       *prometheus.CounterVec
	latency        *prometheus.HistogramVec
	explainLatency *prometheus.HistogramVec
	incomplete     *prometheus.CounterVec
	queueDepth     prometheus.Gauge
	inFlight       prometheus.Gauge
	passes         *prometheus.CounterVec
	points         *prometheus.CounterVec
	stacked        prometheus.Histogram
}

// latencyBuckets span 0.5 ms to about 33 s in powers of two.
var latencyBuckets = prometheus.ExponentialBuckets(0.0005, 2, 17)

func newMetrics() *metrics {
	m := &metrics{reg: prometheus.NewRegistry()}
	m.requests = prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "apportion_http_requests_total",
		Help: "HTTP requests answered, by route and status code (canceled: the client left first).",
	}, []string{"route", "code"})
	m.latency = prometheus.NewHistogramVec(prometheus.HistogramOpts{
		Name:    "apportion_http_request_duration_seconds",
		Help:    "Time from receiving a request to answering it, by route.",
		Buckets: latencyBuckets,
	}, []string{"route"})
	m.explainLatency = prometheus.NewHistogramVec(prometheus.HistogramOpts{
		Name:    "apportion_explain_duration_seconds",
		Help:    "Time to answer a successful /v1/explain request, by attribution method.",
		Buckets: latencyBuckets,
	}, []string{"method"})
	m.incomplete = prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "apportion_completeness_failures_total",
		Help: "Explained samples whose attributions missed the completeness tolerance, by method.",
	}, []string{"method"})
	m.queueDepth = prometheus.NewGauge(prometheus.GaugeOpts{
		Name: "apportion_queue_depth",
		Help: "Requests waiting for a worker.",
	})
	m.inFlight = prometheus.NewGauge(prometheus.GaugeOpts{
		Name: "apportion_requests_in_flight",
		Help: "Requests being computed by a worker.",
	})
	m.passes = prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "apportion_model_passes_total",
		Help: "Calls into the network, by kind (forward; gradient: one forward and one backward pass; path: one exact path integral).",
	}, []string{"kind"})
	m.points = prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "apportion_model_points_total",
		Help: "Samples sent through the network, by kind.",
	}, []string{"kind"})
	m.stacked = prometheus.NewHistogram(prometheus.HistogramOpts{
		Name:    "apportion_stacked_calls",
		Help:    "Model calls of concurrent requests stacked into one pass (when coalescing).",
		Buckets: []float64{1, 2, 3, 4, 6, 8, 12, 16, 32, 64},
	})
	m.reg.MustRegister(m.requests, m.latency, m.explainLatency, m.incomplete, m.queueDepth,
		m.inFlight, m.passes, m.points, m.stacked,
		collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	return m
}

func (m *metrics) countPass(kind string, n int) {
	m.passes.WithLabelValues(kind).Inc()
	m.points.WithLabelValues(kind).Add(float64(n))
}

// handler serves the registry in the Prometheus text format.
func (m *metrics) handler() handlerFunc {
	h := promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{})
	return func(w http.ResponseWriter, r *http.Request, _ *requestLog) { h.ServeHTTP(w, r) }
}

// countingModel counts the passes that reach the network.
type countingModel struct {
	m       gradattr.Model
	metrics *metrics
}

func (c *countingModel) InputShape() []int { return c.m.InputShape() }
func (c *countingModel) OutputSize() int   { return c.m.OutputSize() }

func (c *countingModel) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	c.metrics.countPass("forward", n)
	return c.m.Forward(ctx, x, n)
}

func (c *countingModel) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	c.metrics.countPass("gradient", n)
	return c.m.Gradient(ctx, x, n, target)
}

// PiecewiseLinear is the model's (see gradattr.PathIntegrator).
func (c *countingModel) PiecewiseLinear() error { return piecewiseLinear(c.m) }

// IntegratePath counts an exact path integral as a "path" pass of one
// point.
func (c *countingModel) IntegratePath(ctx context.Context, from, to []float64, target, maxPieces int) ([]float64, int, error) {
	c.metrics.countPass("path", 1)
	return integratePath(ctx, c.m, from, to, target, maxPieces)
}

// GradientSum counts a gradient sum as a gradient pass of n points.
func (c *countingModel) GradientSum(ctx context.Context, x []float64, n int, weight []float64, target int) ([]float64, []float64, error) {
	c.metrics.countPass("gradient", n)
	return gradientSum(ctx, c.m, x, n, weight, target)
}

// PathGradientSum counts a gradient sum as a gradient pass of its points.
func (c *countingModel) PathGradientSum(ctx context.Context, from, to, alpha, weight []float64, target int) ([]float64, []float64, error) {
	c.metrics.countPass("gradient", len(alpha))
	return pathGradientSum(ctx, c.m, from, to, alpha, weight, target)
}

// gradientSum and pathGradientSum pass gradient sums through to m, or
// form them from m's gradients, point by point in order, when m does not
// offer them.
func gradientSum(ctx context.Context, m gradattr.Model, x []float64, n int, weight []float64, target int) ([]float64, []float64, error) {
	if s, ok := m.(gradattr.GradientSummer); ok {
		return s.GradientSum(ctx, x, n, weight, target)
	}
	tgt := make([]int, n)
	for i := range tgt {
		tgt[i] = target
	}
	out, g, err := m.Gradient(ctx, x, n, tgt)
	if err != nil {
		return nil, nil, err
	}
	size := len(g) / max(n, 1)
	sum := make([]float64, size)
	for i, w := range weight {
		for j, v := range g[i*size : (i+1)*size] {
			sum[j] += w * v
		}
	}
	return out, sum, nil
}

func pathGradientSum(ctx context.Context, m gradattr.Model, from, to, alpha, weight []float64, target int) ([]float64, []float64, error) {
	if s, ok := m.(gradattr.GradientSummer); ok {
		return s.PathGradientSum(ctx, from, to, alpha, weight, target)
	}
	x := make([]float64, 0, len(alpha)*len(from))
	for _, a := range alpha {
		for j := range from {
			x = append(x, from[j]+a*(to[j]-from[j]))
		}
	}
	return gradientSum(ctx, m, x, len(alpha), weight, target)
}

// piecewiseLinear and integratePath pass exact path integrals through to
// m, refusing with the reason when m does not offer them.
func piecewiseLinear(m gradattr.Model) error {
	pi, ok := m.(gradattr.PathIntegrator)
	if !ok {
		return errNoPathIntegral
	}
	return pi.PiecewiseLinear()
}

func integratePath(ctx context.Context, m gradattr.Model, from, to []float64, target, maxPieces int) ([]float64, int, error) {
	pi, ok := m.(gradattr.PathIntegrator)
	if !ok {
		return nil, 0, errNoPathIntegral
	}
	return pi.IntegratePath(ctx, from, to, target, maxPieces)
}

var errNoPathIntegral = errors.New("the model does not integrate its gradient along a path")
