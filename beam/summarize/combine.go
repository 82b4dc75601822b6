package summarize

import (
	"bytes"
	"errors"
	"fmt"
	"reflect"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"github.com/apportion/apportion/gradattr"
)

func init() {
	beam.RegisterCoder(reflect.TypeOf(state{}), encodeState, decodeState)
	register.Combiner3[state, explained, state](&groupFn{})
	register.Combiner3[state, state, []byte](&mergeFn{})
}

// state is a combine's accumulator: a summary's exact sums, counts and
// keys, which merge exactly (gradattr.Summary.Merge). Between workers it
// travels in the summary's binary form, which keeps every bit of them
// without the statistics its JSON document derives from them.
type state struct {
	s *gradattr.Summary
}

func encodeState(st state) ([]byte, error) { return st.s.MarshalBinary() }

func decodeState(raw []byte) (state, error) {
	s := new(gradattr.Summary)
	err := s.UnmarshalBinary(raw)
	return state{s}, err
}

// newState returns a new accumulator: an empty summary with the options
// of the JSON document doc, decoded once into *opt.
func newState(doc []byte, opt **gradattr.SummaryOptions) (state, error) {
	if *opt == nil {
		s, err := gradattr.DecodeSummary(bytes.NewReader(doc))
		if err != nil {
			return state{}, fmt.Errorf("summarize: the plan's empty summary: %w", err)
		}
		o := s.Options()
		*opt = &o
	}
	s, err := gradattr.NewSummary(**opt)
	return state{s}, err
}

// groupFn sums the rows of one subgroup: their attributions, and the rows
// that failed as skipped.
type groupFn struct {
	Empty []byte

	opt *gradattr.SummaryOptions
}

func (f *groupFn) CreateAccumulator() (state, error) { return newState(f.Empty, &f.opt) }

// AddInput adds one row. Its attributions were checked (Summary.Check),
// so it fails only for a key another row has, which stops the pipeline.
func (f *groupFn) AddInput(a state, e explained) (state, error) {
	var err error
	if e.Error != "" {
		err = a.s.Skip(e.Key, e.Group, errRow(e.Error))
	} else if e.Incomplete {
		err = a.s.AddIncomplete(e.Key, e.Group, e.Attributions)
	} else {
		err = a.s.Add(e.Key, e.Group, e.Attributions)
	}
	if err != nil {
		return a, fmt.Errorf("%s %s: %w", e.File, e.Where, err)
	}
	return a, nil
}

func (f *groupFn) MergeAccumulators(a, b state) (state, error) { return merge(a, b) }

func (f *groupFn) ExtractOutput(a state) state { return a }

// merge adds b to a exactly; summaries sharing a row key are refused,
// which stops the pipeline.
func merge(a, b state) (state, error) {
	if err := a.s.Merge(b.s); err != nil {
		return a, fmt.Errorf("combining summaries (a key column needs a different value on every row of all the files): %w", err)
	}
	return a, nil
}

// mergeFn merges the summaries of the subgroups into one and writes its
// JSON document, as apportion summarize -format json does.
type mergeFn struct {
	Empty []byte

	opt *gradattr.SummaryOptions
}

func (f *mergeFn) CreateAccumulator() (state, error) { return newState(f.Empty, &f.opt) }

func (f *mergeFn) AddInput(a, b state) (state, error) { return merge(a, b) }

func (f *mergeFn) MergeAccumulators(a, b state) (state, error) { return merge(a, b) }

func (f *mergeFn) ExtractOutput(a state) ([]byte, error) {
	raw, err := a.s.MarshalJSON()
	return append(raw, '\n'), err
}

// errRow is the error of a row that was not read or explained, as the
// summary records it.
func errRow(msg string) error { return errors.New(msg) }
