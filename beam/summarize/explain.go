package summarize

import (
	"context"
	"runtime"
	"sync"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
)

func init() {
	register.DoFn4x1[context.Context, Row, func(string, explained), func(Failed), error](&explainFn{})
	register.Emitter2[string, explained]()
	register.Emitter1[Failed]()
}

// Failed is a row that could not be read or explained: the dead-letter
// output. The summary counts it as skipped, with the same key and error.
type Failed struct {
	Key   uint64 `json:"key"`
	File  string `json:"file"`
	Where string `json:"where"`
	Group string `json:"group,omitempty"`
	Error string `json:"error"`
}

// explained is the outcome of one row, on its way to the summary: its
// attributions, or why it has none.
type explained struct {
	Key          uint64
	Group        string
	Attributions []float64
	// Incomplete is set when the row's completeness check failed.
	Incomplete  bool
	File, Where string
	Error       string
}

// explainFn explains rows in batches of Plan.Config.Batch, each batch on
// as many goroutines as the worker has cores, with the model the worker
// compiled once (Setup).
type explainFn struct {
	Plan *Plan

	w         *worker
	batch     []Row
	explained beam.Counter
	skipped   beam.Counter
}

// setups counts the explainFn instances set up in this process, by plan;
// they share the process's one compiled model.
var setups struct {
	sync.Mutex
	n map[string]int
}

func (f *explainFn) Setup() error {
	setups.Lock()
	if setups.n == nil {
		setups.n = map[string]int{}
	}
	setups.n[f.Plan.ID]++
	setups.Unlock()
	w, err := f.Plan.worker()
	f.w = w
	f.explained = beam.NewCounter("apportion", "rows_explained")
	f.skipped = beam.NewCounter("apportion", "rows_skipped")
	return err
}

func (f *explainFn) ProcessElement(ctx context.Context, r Row, emit func(string, explained), failed func(Failed)) error {
	f.batch = append(f.batch, r)
	if len(f.batch) >= f.batchSize() {
		return f.flush(ctx, emit, failed)
	}
	return nil
}

func (f *explainFn) FinishBundle(ctx context.Context, emit func(string, explained), failed func(Failed)) error {
	return f.flush(ctx, emit, failed)
}

func (f *explainFn) batchSize() int {
	if f.Plan.Config.Batch > 0 {
		return f.Plan.Config.Batch
	}
	return DefaultBatch
}

// flush explains the rows of the batch and emits each outcome, keyed by
// its group, and the rows that failed also to the dead letter.
func (f *explainFn) flush(ctx context.Context, emit func(string, explained), failed func(Failed)) error {
	rows := f.batch
	f.batch = nil
	out := make([]explained, len(rows))
	jobs := make(chan int)
	var wg sync.WaitGroup
	for range max(1, min(runtime.GOMAXPROCS(0), len(rows))) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range jobs {
				out[i] = f.w.explain(ctx, rows[i], f.Plan.Config.By == ByPredicted)
			}
		}()
	}
	for i := range rows {
		jobs <- i
	}
	close(jobs)
	wg.Wait()
	for _, e := range out {
		emit(e.Group, e)
		if e.Error != "" {
			failed(Failed{Key: e.Key, File: e.File, Where: e.Where, Group: e.Group, Error: e.Error})
			f.skipped.Inc(ctx, 1)
		} else {
			f.explained.Inc(ctx, 1)
		}
	}
	return ctx.Err()
}

// explain explains one row as explain.Explainer.Summarize does: a row
// that was not read, or whose explanation fails or would not be taken by
// the summary, keeps its error.
func (w *worker) explain(ctx context.Context, r Row, byPredicted bool) explained {
	e := explained{Key: r.Key, Group: r.Group, File: r.File, Where: r.Where, Error: r.Error}
	if e.Error != "" {
		return e
	}
	res, err := w.ex.Attribute(ctx, r.Values)
	if err == nil && byPredicted {
		e.Group = w.model.Meta.Class(gradattr.Top(res.Outputs))
	}
	if err == nil {
		err = w.empty.Check(r.Key, res.Attributions)
	}
	if err != nil {
		e.Error = explain.UserError(err).Error()
		return e
	}
	e.Attributions = res.Attributions
	e.Incomplete = explain.Incomplete(res)
	return e
}
