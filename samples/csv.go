package samples

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
)

// ReadCSV reads one sample per row. A first row with a field that is not a
// number is a header. When the file has a header and the model names its
// features (features, one name per value of a sample), the columns are
// matched by name, in the model's order, and other columns are ignored;
// otherwise the columns are the sample's values in order. A row that cannot
// be read is marked bad in the batch, with its line. Numbers are written
// in decimal notation (see RangeError for those out of range).
func ReadCSV(r io.Reader, spec Spec, features []string) (*Batch, error) {
	return readAll(newCSVSource(r, spec, features))
}

// csvSource reads the rows of a CSV file of samples as they are asked for.
type csvSource struct {
	cr     *csv.Reader
	header []string
	// cols are the fields read, in the sample's order; byName is set when
	// they were found by the model's feature names.
	cols   []int
	byName bool
	sample []int
	// pending is the first data row, read to size the samples.
	pending     []string
	pendingLine int
}

func newCSVSource(r io.Reader, spec Spec, features []string) (*csvSource, error) {
	s := &csvSource{cr: newCSVReader(r)}
	rec, line, err := s.record()
	if err == nil && !dataRow(rec) {
		s.header = trimmed(rec)
		rec, line, err = s.record()
	}
	if err == io.EOF {
		return nil, fmt.Errorf("expected at least one row of numbers, got none")
	}
	if err != nil {
		return nil, err
	}
	s.pending, s.pendingLine = rec, line
	ps, fixed := spec.FixedSample()
	if s.header != nil && len(features) > 0 && (!fixed || len(features) == Product(ps)) {
		if s.cols, err = columnsByName(s.header, features); err != nil {
			return nil, err
		}
		s.byName = true
		s.sample = ps
		if !fixed {
			s.sample = []int{len(s.cols)}
		}
		return s, nil
	}
	width := len(rec)
	if s.header != nil {
		width = len(s.header)
	}
	if fixed {
		width = Product(ps)
	}
	if s.header != nil && len(s.header) != width {
		return nil, fmt.Errorf("header has %d names, expected %d (one per value of a sample of shape %s)", len(s.header), width, ShapeString(ps))
	}
	s.cols = make([]int, width)
	for j := range s.cols {
		s.cols[j] = j
	}
	s.sample = ps
	if !fixed {
		s.sample = []int{width}
		if per, ok := spec.PerSample(); ok && len(per) != 1 {
			return nil, fmt.Errorf("expected samples of shape %s, which a CSV row of %d values cannot fill", ShapeString(per), width)
		}
	}
	return s, nil
}

// features names the columns read, when the file has a header.
func (s *csvSource) features() []string {
	if s.byName {
		return pick(s.header, s.cols)
	}
	return s.header
}

// ignored names the header's columns a read by feature names leaves out.
func (s *csvSource) ignored() []string {
	if s.byName {
		return unread(s.header, s.cols, -1)
	}
	return nil
}

// record reads the next record and the line it starts on.
func (s *csvSource) record() ([]string, int, error) {
	if s.pending != nil {
		rec := s.pending
		s.pending = nil
		return rec, s.pendingLine, nil
	}
	rec, line, err := nextRecord(s.cr)
	if err != nil && err != io.EOF {
		err = fmt.Errorf("reading CSV: %w", err)
	}
	return rec, line, err
}

// nextRecord reads the next record of cr and the line it starts on.
func nextRecord(cr *csv.Reader) ([]string, int, error) {
	rec, err := cr.Read()
	if err != nil {
		return nil, 0, err
	}
	line, _ := cr.FieldPos(0)
	return rec, line, nil
}

func (s *csvSource) next(n, first int) (*Batch, error) {
	b := &Batch{Data: make([]float64, 0, min(n*len(s.cols), 1<<16))}
	for b.Samples < n {
		rec, line, err := s.record()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, err
		}
		where := fmt.Sprintf("line %d", line)
		x, err := s.row(rec)
		if err != nil {
			b.MarkBad(b.Samples, fmt.Errorf("%s%w", where, err))
			x = appendNaN(nil, len(s.cols))
		}
		b.Data = append(b.Data, x...)
		b.Samples++
	}
	if b.Samples == 0 {
		return nil, io.EOF
	}
	b.Shape = append([]int{b.Samples}, s.sample...)
	return b, nil
}

// row reads the sample of one record; its error starts with the
// separator that follows where the record is.
func (s *csvSource) row(rec []string) ([]float64, error) {
	if s.byName {
		if len(rec) != len(s.header) {
			return nil, fmt.Errorf(": expected %d fields, as in the header, got %d", len(s.header), len(rec))
		}
		x, err := parseFields(rec, s.cols, true, func(j int) string { return "column " + s.header[j] })
		if err != nil {
			return nil, fmt.Errorf(", %w", err)
		}
		return x, nil
	}
	if len(rec) != len(s.cols) {
		return nil, fmt.Errorf(": expected %d values, got %d", len(s.cols), len(rec))
	}
	name := func(j int) string { return "column " + strconv.Itoa(j+1) }
	if s.header != nil {
		name = func(j int) string { return "column " + s.header[j] }
	}
	x, err := parseFields(rec, s.cols, true, name)
	if err != nil {
		return nil, fmt.Errorf(", %w", err)
	}
	return x, nil
}

// Table is a CSV file of rows to explain, with columns the model does not
// see, or the samples of another file as rows.
type Table struct {
	// Columns names the columns read as the samples' values, in order;
	// nil for a file that is not CSV.
	Columns []string
	// Ignored names the columns of a CSV file that are neither values nor
	// the group column, in file order.
	Ignored []string
	// SampleShape is the shape of one sample of a file that is not CSV;
	// nil for CSV, whose samples are flat.
	SampleShape []int
	// Rows holds every row, in file order, read or not.
	Rows []Row
}

// Row is one row of a Table: its values and its group, or why it could
// not be read.
type Row struct {
	// Where says where the row is: "line 7" (CSV), "sample 3".
	Where string
	// Values holds the sample; nil when Err is set.
	Values []float64
	// Group is the row's value in the group column ("(empty)" for an
	// empty field); "" without a group column.
	Group string
	// Key is the row's key (see RowKey) when the table has a key column
	// (TableOptions.Key); a row without one (an empty field, a short row)
	// has the key of its place instead (see PlaceKey).
	Key uint64
	// Err says why the row cannot be used: a field that is not a number,
	// a NaN or infinity (wrapping ErrNonFinite), a wrong field count.
	Err error
}

// TableOptions say which columns of a Table hold what.
type TableOptions struct {
	// Features are the model's feature names: when there are Size of
	// them, they name the columns to read, in order.
	Features []string
	// Size is the number of values of one sample; 0 when the model leaves
	// it open (every numeric column is read).
	Size int
	// Group names the column whose value groups the rows; "" for none.
	Group string
	// Key names the column whose value tells each row apart (see
	// Row.Key); "" for none.
	Key string
	// Vocabulary reads a text file (one text per line) as token ids; nil
	// when the model has none.
	Vocabulary *Vocabulary
}

// ColumnError reports a column a table does not have.
type ColumnError struct {
	// Column is the column asked for; File names the file.
	Column, File string
	// Columns are the file's columns.
	Columns []string
}

func (e *ColumnError) Error() string {
	return fmt.Sprintf("no column %q in %s (columns: %s)", e.Column, e.File, strings.Join(e.Columns, ", "))
}

// ReadTable reads the rows of the file called name. A CSV file must start
// with a header row naming its columns. The samples' values are the columns
// named by opt.Features (when it names Size of them), else the first Size
// numeric columns other than the group and key columns, or every numeric
// column when Size is 0. Any other format is read as by Read, one row per
// sample. A row that cannot be used keeps its error; the others are read.
// Two rows with the same key are an error: a key column tells rows apart.
func ReadTable(r io.Reader, name string, spec Spec, opt TableOptions) (*Table, error) {
	tr, err := NewTableReader(r, name, spec, opt)
	if err != nil {
		return nil, err
	}
	t := &Table{Columns: tr.Columns, Ignored: tr.Ignored, SampleShape: tr.SampleShape}
	for {
		rows, err := tr.Next(readChunk)
		if err == io.EOF {
			return t, nil
		}
		if err != nil {
			return nil, err
		}
		t.Rows = append(t.Rows, rows...)
	}
}

// TableReader reads the rows of a table a batch at a time, in file order,
// so that a table of any length is summarised in constant memory (see
// ReadTable for the columns read).
type TableReader struct {
	// Columns, Ignored and SampleShape are the table's (see Table).
	Columns     []string
	Ignored     []string
	SampleShape []int
	next        func(n int) ([]Row, error)
}

// Next returns the next rows, at most n (n < 1 means 1), or io.EOF after
// the last.
func (t *TableReader) Next(n int) ([]Row, error) { return t.next(max(n, 1)) }

// NewTableReader starts reading the rows of the file called name: a CSV
// file's header and its first rows, which choose the columns; another
// format's header.
func NewTableReader(r io.Reader, name string, spec Spec, opt TableOptions) (*TableReader, error) {
	f, err := FormatOf(name)
	if err != nil {
		return nil, fmt.Errorf("input %s: %w", name, err)
	}
	if f == CSV {
		return newCSVTable(r, name, opt)
	}
	for _, c := range []struct{ what, name string }{{"group", opt.Group}, {"key", opt.Key}} {
		if c.name != "" {
			return nil, fmt.Errorf("input %s: %s column %q: the file is not CSV, the one format with named columns", name, c.what, c.name)
		}
	}
	s, err := NewStream(r, name, spec, Options{KeepBad: true, Vocabulary: opt.Vocabulary})
	if err != nil {
		return nil, err
	}
	t := &TableReader{}
	t.next = func(n int) ([]Row, error) {
		b, err := s.Next(n)
		if err != nil {
			return nil, err
		}
		t.SampleShape = b.SampleShape()
		rows := make([]Row, b.Samples)
		for i := range rows {
			row := Row{Where: "sample " + strconv.Itoa(b.First+i), Values: b.Sample(i), Err: b.Bad[i]}
			if row.Err == nil {
				row.Err = CheckFinite(row.Values)
			}
			if row.Err != nil {
				row.Values = nil
			}
			rows[i] = row
		}
		return rows, nil
	}
	// The sample shape is known once the first samples are read.
	first, err := t.next(readChunk)
	if err != nil {
		return nil, err
	}
	next := t.next
	t.next = func(n int) ([]Row, error) {
		if first != nil {
			rows := first
			first = nil
			return rows, nil
		}
		return next(n)
	}
	return t, nil
}

// numericSniff is the number of rows whose fields decide which columns of
// a table are numeric.
const numericSniff = 20

func newCSVTable(r io.Reader, name string, opt TableOptions) (*TableReader, error) {
	cr := newCSVReader(r)
	rec, err := cr.Read()
	if err == io.EOF {
		return nil, fmt.Errorf("input %s: reading the header: %w", name, io.EOF)
	}
	if err != nil {
		return nil, fmt.Errorf("input %s: %w", name, err)
	}
	header := trimmed(rec)
	if numericRow(header) {
		return nil, fmt.Errorf("input %s: expected a header row naming the columns, got a row of numbers", name)
	}
	// The first rows, read ahead to find the numeric columns.
	var ahead [][]string
	var lines []int
	for len(ahead) < numericSniff {
		rec, line, err := nextRecord(cr)
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("input %s: %w", name, err)
		}
		ahead, lines = append(ahead, rec), append(lines, line)
	}
	if len(ahead) == 0 {
		return nil, fmt.Errorf("input %s: expected at least one data row after the header, got none", name)
	}
	index := columnIndex(header)
	column := func(c string) (int, error) {
		if c == "" {
			return -1, nil
		}
		j, ok := index[c]
		if !ok {
			return -1, &ColumnError{Column: c, File: name, Columns: header}
		}
		return j, nil
	}
	groupCol, err := column(opt.Group)
	if err != nil {
		return nil, err
	}
	keyCol, err := column(opt.Key)
	if err != nil {
		return nil, err
	}
	var cols []int
	if k := opt.Size; k > 0 && len(opt.Features) == k {
		if cols, err = columnsByName(header, opt.Features); err != nil {
			return nil, fmt.Errorf("input %s: %w", name, err)
		}
	} else {
		for j := range header {
			if j != groupCol && j != keyCol && numericColumn(ahead, j) {
				cols = append(cols, j)
			}
		}
		if k > 0 {
			if len(cols) < k {
				return nil, fmt.Errorf("input %s: the model takes %d features, the file has %d numeric columns (%s)", name, k, len(cols), strings.Join(pick(header, cols), ", "))
			}
			cols = cols[:k]
		}
	}
	keyLines := map[uint64]int{}
	row := func(rec []string, line int) (Row, error) {
		row := Row{Where: "line " + strconv.Itoa(line)}
		var keyErr error
		if keyCol >= 0 {
			if keyCol < len(rec) && strings.TrimSpace(rec[keyCol]) != "" {
				row.Key = RowKey(strings.TrimSpace(rec[keyCol]))
				if first, dup := keyLines[row.Key]; dup {
					return row, fmt.Errorf("input %s: key column %s: line %d has the key %q of line %d; a key column needs a different value on every row", name, opt.Key, line, strings.TrimSpace(rec[keyCol]), first)
				}
				keyLines[row.Key] = line
			} else {
				row.Key = PlaceKey(name, row.Where)
				keyErr = fmt.Errorf("key column %s: no key, expected a value that tells the row apart", opt.Key)
			}
		}
		if len(rec) != len(header) {
			row.Err = fmt.Errorf("expected %d fields, as in the header, got %d", len(header), len(rec))
			return row, nil
		}
		if groupCol >= 0 {
			row.Group = strings.TrimSpace(rec[groupCol])
			if row.Group == "" {
				row.Group = "(empty)"
			}
		}
		row.Values, row.Err = parseFields(rec, cols, true, func(j int) string { return "column " + header[j] })
		if row.Err == nil && keyErr != nil {
			row.Values, row.Err = nil, keyErr
		}
		return row, nil
	}
	t := &TableReader{Columns: pick(header, cols), Ignored: unread(header, cols, groupCol, keyCol)}
	t.next = func(n int) ([]Row, error) {
		var rows []Row
		for len(rows) < n {
			var rec []string
			var line int
			if len(ahead) > 0 {
				rec, line = ahead[0], lines[0]
				ahead, lines = ahead[1:], lines[1:]
			} else {
				var err error
				rec, line, err = nextRecord(cr)
				if err == io.EOF {
					break
				}
				if err != nil {
					return nil, fmt.Errorf("input %s: %w", name, err)
				}
			}
			r, err := row(rec, line)
			if err != nil {
				return nil, err
			}
			rows = append(rows, r)
		}
		if len(rows) == 0 {
			return nil, io.EOF
		}
		return rows, nil
	}
	return t, nil
}

// MaxNumberKey is the largest key field that is its own key (see RowKey).
const MaxNumberKey = 1<<63 - 1

// RowKey returns the key of a row whose key field holds text. A whole
// number from 0 to MaxNumberKey, in decimal digits without leading zeros,
// is its own key, so that a summary of rows numbered 0, 1, 2, ... records
// its keys as one range. Any other text has the key 2^63 + the first 63
// bits of its SHA-256 (big-endian), apart from the numbers; two texts share
// a key with probability about n²/2^64 among n rows.
func RowKey(text string) uint64 {
	if v, err := strconv.ParseUint(text, 10, 63); err == nil && strconv.FormatUint(v, 10) == text {
		return v
	}
	sum := sha256.Sum256([]byte(text))
	return 1<<63 | binary.BigEndian.Uint64(sum[:8])>>1
}

// PlaceKey returns the key of the row at where ("line 7", "sample 3") in
// the file called name: RowKey of the two joined by a newline. It keys rows
// that have no key column, and those whose key field is empty.
func PlaceKey(name, where string) uint64 {
	return RowKey(name + "\n" + where)
}

// newCSVReader reads records of any length whose fields lose their
// leading space.
func newCSVReader(r io.Reader) *csv.Reader {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.TrimLeadingSpace = true
	cr.ReuseRecord = false
	return cr
}

// parseFields reads the fields cols of rec as numbers, refusing NaN and
// infinities when finite is set; an error names the field by name(j).
func parseFields(rec []string, cols []int, finite bool, name func(j int) string) ([]float64, error) {
	x := make([]float64, len(cols))
	for n, j := range cols {
		f := strings.TrimSpace(rec[j])
		v, err := parseDecimal(f, false)
		switch {
		case errors.Is(err, errNotNumber):
			return nil, fmt.Errorf("%s: %q is not a number", name(j), f)
		case err != nil:
			return nil, fmt.Errorf("%s: %w", name(j), err)
		case finite && (math.IsNaN(v) || math.IsInf(v, 0)):
			return nil, fmt.Errorf("%s: %s %w", name(j), f, ErrNonFinite)
		}
		x[n] = v
	}
	return x, nil
}

// columnsByName returns the positions of the features in the header. A
// feature the header lacks is an error naming every one missing.
func columnsByName(header, features []string) ([]int, error) {
	index := columnIndex(header)
	cols := make([]int, len(features))
	var missing []string
	for i, f := range features {
		j, ok := index[f]
		if !ok {
			missing = append(missing, strconv.Quote(f))
		}
		cols[i] = j
	}
	if len(missing) > 0 {
		what := "feature " + missing[0] + " is not a column"
		if len(missing) > 1 {
			what = "features " + strings.Join(missing, ", ") + " are not columns"
		}
		return nil, fmt.Errorf("the model's %s of the file (the header is matched to the feature names in the model's metadata; the columns are %s)", what, strings.Join(header, ", "))
	}
	return cols, nil
}

// unread returns the columns of header that are not in cols nor among the
// columns skip (-1 for none), in file order.
func unread(header []string, cols []int, skip ...int) []string {
	used := map[int]bool{}
	for _, j := range skip {
		used[j] = true
	}
	for _, j := range cols {
		used[j] = true
	}
	var out []string
	for j, h := range header {
		if !used[j] {
			out = append(out, h)
		}
	}
	return out
}

// columnIndex maps each column name to its first position.
func columnIndex(header []string) map[string]int {
	index := map[string]int{}
	for i, h := range header {
		if _, dup := index[h]; !dup {
			index[h] = i
		}
	}
	return index
}

// dataRow reports whether rec is a row of samples rather than a header:
// every field is a number, or starts as one does (a digit, or a sign or
// point before a digit), so that a first row holding "1_000" or "0x1p-2" is
// a row whose values cannot be read, not a header of names.
func dataRow(rec []string) bool {
	for _, f := range rec {
		f = strings.TrimSpace(f)
		if isNumber(f) {
			continue
		}
		digits := strings.TrimLeft(f, "+-.")
		if digits == "" || !isDigit(digits[0]) || len(f)-len(digits) > 2 {
			return false
		}
	}
	return true
}

// numericRow reports whether every field of rec is a number.
func numericRow(rec []string) bool {
	for _, f := range rec {
		if !isNumber(strings.TrimSpace(f)) {
			return false
		}
	}
	return true
}

// numericColumn reports whether most of the first rows hold a number in
// column j.
func numericColumn(records [][]string, j int) bool {
	n, yes := 0, 0
	for _, rec := range records[:min(len(records), numericSniff)] {
		if j >= len(rec) {
			continue
		}
		n++
		if isNumber(strings.TrimSpace(rec[j])) {
			yes++
		}
	}
	return n > 0 && 2*yes > n
}

func trimmed(rec []string) []string {
	out := make([]string, len(rec))
	for i, f := range rec {
		out[i] = strings.TrimSpace(f)
	}
	return out
}

func pick(s []string, idx []int) []string {
	out := make([]string, len(idx))
	for i, j := range idx {
		out[i] = s[j]
	}
	return out
}
