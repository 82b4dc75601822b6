package summarize

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"runtime"
	"sync"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// ByPredicted is the Config.By that groups rows by the model's predicted
// class instead of a column.
const ByPredicted = "predicted"

// DefaultBatch is the number of rows a worker explains at once when
// Config.Batch is zero.
const DefaultBatch = 64

// Config says what to summarise and how, as the command line says it.
type Config struct {
	// Model holds the ONNX model's bytes; ModelName names it in messages.
	// The model travels with the pipeline, so its external data, if any,
	// is refused.
	Model     []byte
	ModelName string
	// Settings are the explain settings, each a field and its text,
	// applied in order with explain.Settings.Set: method, target, output,
	// logits, baseline, reference, steps, rule, tolerance, samples, noise.
	Settings []Setting
	// Reference and Baseline are the files the settings name (a reference
	// set, a file of baseline samples), read by the caller; nil for none.
	Reference, Baseline *File
	// By names the column whose values group the rows, or ByPredicted; ""
	// for no groups.
	By string
	// Key names the column whose value keys each row (see
	// samples.RowKey); "" keys a row by its file name and place (see
	// samples.PlaceKey).
	Key string
	// Bootstrap is the number of bootstrap replicates; 0 means
	// gradattr.DefaultBootstrap.
	Bootstrap int
	// Seed seeds the bootstrap weights and the random methods.
	Seed uint64
	// Batch is the number of rows a worker explains at once, on as many
	// goroutines as it has cores; 0 means DefaultBatch.
	Batch int
}

// Setting is one explain setting as text (see explain.Settings.Set).
type Setting struct {
	Field explain.Field
	Text  string
}

// File is a file read by the caller: its name and bytes.
type File struct {
	Name string
	Data []byte
}

// Plan is a Config checked against the model and the data, with what
// workers need to read and explain rows the same way everywhere. Make one
// with NewPlan; transforms carry it to the workers.
type Plan struct {
	Config Config
	// Spec is the model input rows are read for.
	Spec samples.Spec
	// Columns names the CSV columns read as features, in the model's
	// order; nil when the data is not CSV.
	Columns []string
	// InputShapes are the per-sample shapes the model is compiled for
	// (explain.CompileOptions.InputShapes).
	InputShapes map[string][]int
	// Empty is the JSON document of the empty summary: the model's
	// SHA-256, the method, the settings record, the features, the
	// grouping and the bootstrap.
	Empty []byte
	// ID identifies the plan: the SHA-256 of the rest.
	ID string
}

// NewPlan checks cfg against its model and a file of the data, the first
// (read from r, called name), which decides the feature columns when the
// model does not name its features and the shape of a sample when the
// model leaves it open. With r nil the plan is for typed rows (Summarize)
// of a model that declares the shape of its samples. Errors in the
// settings are *explain.FieldError.
func NewPlan(cfg Config, r io.Reader, name string) (*Plan, error) {
	m, settings, err := cfg.model()
	if err != nil {
		return nil, err
	}
	spec, err := m.Input()
	if err != nil {
		return nil, err
	}
	table := &samples.Table{}
	var inputShapes map[string][]int
	if r != nil {
		if table, inputShapes, err = cfg.sample(m, spec, r, name); err != nil {
			return nil, err
		}
	} else if _, ok := spec.FixedSample(); !ok {
		return nil, fmt.Errorf("model input %q leaves the shape of a sample open (%s): plan with a file of the data", spec.Name, samples.ShapeString(spec.Shape))
	}
	p := &Plan{Config: cfg, Spec: spec, Columns: table.Columns, InputShapes: inputShapes}
	ex, err := p.explainer(m, settings)
	if err != nil {
		return nil, err
	}
	sopt, err := ex.SummaryOptions(ex.Features(table.Columns), cfg.By, cfg.Bootstrap, cfg.Seed)
	if err != nil {
		return nil, err
	}
	s, err := gradattr.NewSummary(sopt)
	if err != nil {
		return nil, err
	}
	if p.Empty, err = s.MarshalJSON(); err != nil {
		return nil, err
	}
	raw, err := json.Marshal(p)
	if err != nil {
		return nil, err
	}
	sum := sha256.Sum256(raw)
	p.ID = hex.EncodeToString(sum[:])
	return p, nil
}

// sample reads the first file of the data, called name, as the workers
// will read every file, and returns it with the shape of its samples
// where the model leaves it open.
func (c *Config) sample(m *explain.Model, spec samples.Spec, r io.Reader, name string) (*samples.Table, map[string][]int, error) {
	opt := samples.TableOptions{Features: m.Meta.Features, Key: c.Key}
	if c.By != ByPredicted {
		opt.Group = c.By
	}
	if ps, ok := spec.FixedSample(); ok {
		opt.Size = samples.Product(ps)
	}
	table, err := samples.ReadTable(r, name, spec, opt)
	if err != nil {
		return nil, nil, err
	}
	for _, row := range table.Rows {
		if row.Err != nil {
			continue
		}
		shape := append([]int{1}, table.SampleShape...)
		if table.SampleShape == nil {
			shape = []int{1, len(row.Values)}
		}
		return table, explain.OpenShapes(spec, &samples.Batch{Shape: shape, Samples: 1, Data: row.Values}), nil
	}
	return nil, nil, fmt.Errorf("input %s: no row could be read (first problem: %s: %v)", name, table.Rows[0].Where, table.Rows[0].Err)
}

// model decodes the model and reads the settings.
func (c *Config) model() (*explain.Model, explain.Settings, error) {
	settings := explain.Defaults()
	for _, s := range c.Settings {
		if err := settings.Set(s.Field, s.Text); err != nil {
			return nil, settings, err
		}
	}
	settings.Seed = c.Seed // not Set: it seeds the bootstrap whatever the method
	if err := settings.Check(); err != nil {
		return nil, settings, err
	}
	m, err := explain.Decode(c.Model, c.ModelName, explain.DecodeOptions{})
	if err != nil {
		return nil, settings, err
	}
	if _, err := m.Output(settings.Output); err != nil {
		return nil, settings, err
	}
	return m, settings, nil
}

// explainer compiles m and joins it with the settings and the files they
// name.
func (p *Plan) explainer(m *explain.Model, settings explain.Settings) (*explain.Explainer, error) {
	if err := m.Compile(explain.CompileOptions{InputShapes: p.InputShapes, Parallel: runtime.GOMAXPROCS(0)}); err != nil {
		return nil, err
	}
	compiles.add(p.ID)
	for _, d := range []struct {
		field explain.Field
		file  *File
		set   **explain.Dataset
	}{
		{explain.FieldReference, p.Config.Reference, &settings.Reference},
		{explain.FieldBaseline, p.Config.Baseline, &settings.Baseline.Samples},
	} {
		if d.file == nil {
			continue
		}
		b, err := samples.Read(bytes.NewReader(d.file.Data), d.file.Name, p.Spec, m.ReadOptions(false))
		if err != nil {
			return nil, fmt.Errorf("%s: %w", d.field, err)
		}
		*d.set = explain.NewDataset(d.file.Name, d.file.Data, b)
	}
	head, err := m.Head(settings.Output, settings.Logits)
	if err != nil {
		return nil, err
	}
	return explain.New(m, head, settings)
}

// worker is what a worker process explains rows with: built once per
// plan and process, and shared by every DoFn instance in it (a compiled
// model is safe for concurrent use).
type worker struct {
	model *explain.Model
	ex    *explain.Explainer
	empty *gradattr.Summary // checks attributions as the summary will
}

var workers = struct {
	sync.Mutex
	m map[string]*workerOnce
}{m: map[string]*workerOnce{}}

type workerOnce struct {
	once sync.Once
	w    *worker
	err  error
}

// worker returns the plan's worker in this process, building it the
// first time.
func (p *Plan) worker() (*worker, error) {
	workers.Lock()
	e := workers.m[p.ID]
	if e == nil {
		e = &workerOnce{}
		workers.m[p.ID] = e
	}
	workers.Unlock()
	e.once.Do(func() {
		m, settings, err := p.Config.model()
		if err != nil {
			e.err = err
			return
		}
		ex, err := p.explainer(m, settings)
		if err != nil {
			e.err = err
			return
		}
		empty, err := gradattr.DecodeSummary(bytes.NewReader(p.Empty))
		e.w, e.err = &worker{model: m, ex: ex, empty: empty}, err
	})
	return e.w, e.err
}

// compiles counts the models compiled for each plan in this process.
var compiles = counter{n: map[string]int{}}

type counter struct {
	sync.Mutex
	n map[string]int
}

func (c *counter) add(id string) {
	c.Lock()
	c.n[id]++
	c.Unlock()
}

func (c *counter) get(id string) int {
	c.Lock()
	defer c.Unlock()
	return c.n[id]
}
