package explain

import (
	"context"
	"fmt"
	"runtime"
	"sync"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// SummaryOptions returns the options of a summary of rows explained by e:
// the model's SHA-256, the method and the settings record, in which files
// are named by their digest so that summaries of parts of a data set made
// in different places merge; features, grouping, replicates and seed as
// given (see gradattr.SummaryOptions).
func (e *Explainer) SummaryOptions(features []string, groupBy string, bootstrap int, seed uint64) (gradattr.SummaryOptions, error) {
	o, err := e.options(nil, byDigest)
	if err != nil {
		return gradattr.SummaryOptions{}, err
	}
	return gradattr.SummaryOptions{
		Features: features, Model: e.model.SHA256, Method: e.settings.Method,
		Settings: e.record(o, byDigest),
		GroupBy:  groupBy, Bootstrap: bootstrap, Seed: seed,
	}, nil
}

// Features names the features of a summary: the model's names, else the
// columns the rows were read from (samples.Table.Columns), else by index
// (see modelmeta.Meta.Labels).
func (e *Explainer) Features(columns []string) []string {
	switch {
	case e.layer != nil:
	case len(e.model.Meta.Features) == e.size:
		return append([]string(nil), e.model.Meta.Features...)
	case len(columns) == e.size:
		return append([]string(nil), columns...)
	}
	meta := e.model.Meta
	meta.Features = nil
	return meta.Labels(e.attrShape)
}

// SummarizeOptions tune Summarize.
type SummarizeOptions struct {
	// FirstKey is the row key of the first row; row i has key FirstKey+i.
	FirstKey uint64
	// Keyed keys each row by its Row.Key instead, the key read from a key
	// column (samples.TableOptions.Key), so that a row's bootstrap weights
	// do not depend on where it is in the rows given.
	Keyed bool
	// ByPredicted groups rows by their predicted class (the model's class
	// name of the largest output) instead of Row.Group.
	ByPredicted bool
	// Workers is the number of rows explained at once; 0 means GOMAXPROCS.
	Workers int
	// Progress, when set, is called after each row explained.
	Progress func()
}

// Skipped is a row left out of a summary, and why.
type Skipped struct {
	// Row is the row's index in the rows given.
	Row int
	// Where says where the row is (samples.Row.Where).
	Where string
	Err   error
}

// Incomplete reports whether r's completeness check was judged and
// failed: a row a summary counts in its incomplete rows.
func Incomplete(r *gradattr.Result) bool {
	return r.Completeness != nil && r.Completeness.Judged && !r.Completeness.OK
}

// Summarize explains every row that was read (Row.Err nil), concurrently,
// and adds its attributions to s under its key (with AddIncomplete when
// its completeness check failed); a row that was not read or whose
// explanation fails is skipped in s. It returns the skipped
// rows in row order. The error is one that stops every row: settings that
// cannot explain single rows.
func (e *Explainer) Summarize(ctx context.Context, rows []samples.Row, s *gradattr.Summary, opt SummarizeOptions) ([]Skipped, error) {
	add := func(key uint64, group string, _ []float64, r *gradattr.Result) error {
		if Incomplete(r) {
			return s.AddIncomplete(key, group, r.Attributions)
		}
		return s.Add(key, group, r.Attributions)
	}
	return e.summarizeRows(ctx, rows, add, s.Skip, opt)
}

// TokenSummaryOptions returns the options of a token summary of rows
// explained by e, as SummaryOptions does, with the vocabulary's padding
// token named. It fails when e's attributions are not one per token.
func (e *Explainer) TokenSummaryOptions(groupBy string) (gradattr.TokenSummaryOptions, error) {
	if !e.tokens {
		return gradattr.TokenSummaryOptions{}, fmt.Errorf("a summary per token string needs a model of token ids explained at its embedding")
	}
	o, err := e.options(nil, byDigest)
	if err != nil {
		return gradattr.TokenSummaryOptions{}, err
	}
	padding := ""
	if v := e.model.Vocabulary(); v != nil {
		padding = v.Token(v.Padding)
	}
	return gradattr.TokenSummaryOptions{
		Model: e.model.SHA256, Method: e.settings.Method, Settings: e.record(o, byDigest),
		GroupBy: groupBy, Padding: padding,
	}, nil
}

// SummarizeTokens is Summarize for a model of token ids explained at its
// embedding (Model.Tokens): each row's per-token attributions are added
// to s under the row's token strings (Model.TokenNames).
func (e *Explainer) SummarizeTokens(ctx context.Context, rows []samples.Row, s *gradattr.TokenSummary, opt SummarizeOptions) ([]Skipped, error) {
	if !e.tokens {
		return nil, fmt.Errorf("a summary per token string needs a model of token ids explained at its embedding")
	}
	add := func(key uint64, group string, x []float64, r *gradattr.Result) error {
		if Incomplete(r) {
			return s.AddIncomplete(key, group, e.model.TokenNames(x), r.Attributions)
		}
		return s.Add(key, group, e.model.TokenNames(x), r.Attributions)
	}
	return e.summarizeRows(ctx, rows, add, s.Skip, opt)
}

// summarizeRows explains the rows concurrently and hands each explained
// row to add, each row that was not read or whose explanation (or add)
// failed to skip, under the row's key.
func (e *Explainer) summarizeRows(ctx context.Context, rows []samples.Row,
	add func(key uint64, group string, x []float64, r *gradattr.Result) error,
	skip func(key uint64, group string, err error) error, opt SummarizeOptions) ([]Skipped, error) {
	o, err := e.options(nil, byName)
	if err != nil {
		return nil, err
	}
	key := func(i int) uint64 {
		if opt.Keyed {
			return rows[i].Key
		}
		return opt.FirstKey + uint64(i)
	}
	failed := make([]error, len(rows))
	fail := func(i int, group string, err error) {
		failed[i] = err
		// Each row key is taken once, so skip cannot fail.
		_ = skip(key(i), group, err)
	}
	var todo []int
	for i, r := range rows {
		if r.Err != nil {
			fail(i, r.Group, r.Err)
		} else {
			todo = append(todo, i)
		}
	}
	type outcome struct {
		i   int
		res *gradattr.Result
		err error
	}
	jobs := make(chan int)
	results := make(chan outcome)
	workers := opt.Workers
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	var wg sync.WaitGroup
	for range max(1, min(workers, len(todo))) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range jobs {
				res, _, _, err := e.attribute(ctx, e.head, rows[i].Values, o)
				err = UserError(err)
				results <- outcome{i, res, err}
			}
		}()
	}
	go func() {
		for _, i := range todo {
			jobs <- i
		}
		close(jobs)
		wg.Wait()
		close(results)
	}()
	for r := range results {
		if opt.Progress != nil {
			opt.Progress()
		}
		group := rows[r.i].Group
		err := r.err
		if err == nil && opt.ByPredicted {
			group = e.model.Meta.Class(gradattr.Top(r.res.Outputs))
		}
		if err == nil {
			err = add(key(r.i), group, rows[r.i].Values, r.res)
		}
		if err != nil {
			fail(r.i, group, err)
		}
	}
	var skipped []Skipped
	for i, err := range failed {
		if err != nil {
			skipped = append(skipped, Skipped{Row: i, Where: rows[i].Where, Err: err})
		}
	}
	return skipped, nil
}
