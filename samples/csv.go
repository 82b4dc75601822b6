package samples

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/csv"
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
// be read is marked bad in the batch, with its line.
func ReadCSV(r io.Reader, spec Spec, features []string) (*Batch, error) {
	records, lines, err := readRecords(r)
	if err != nil {
		return nil, fmt.Errorf("reading CSV: %w", err)
	}
	var header []string
	if len(records) > 0 && !numericRow(records[0]) {
		header, records, lines = trimmed(records[0]), records[1:], lines[1:]
	}
	if len(records) == 0 {
		return nil, fmt.Errorf("expected at least one row of numbers, got none")
	}
	ps, fixed := spec.FixedSample()
	if header != nil && len(features) > 0 && (!fixed || len(features) == Product(ps)) {
		cols, err := columnsByName(header, features)
		if err != nil {
			return nil, err
		}
		sample := ps
		if !fixed {
			sample = []int{len(cols)}
		}
		b := &Batch{Shape: append([]int{len(records)}, sample...), Samples: len(records), Features: pick(header, cols),
			Ignored: unread(header, cols)}
		b.Data = make([]float64, 0, len(cols)*len(records))
		for i, rec := range records {
			where := fmt.Sprintf("line %d", lines[i])
			if len(rec) != len(header) {
				b.markBad(i, fmt.Errorf("%s: expected %d fields, as in the header, got %d", where, len(header), len(rec)))
				b.Data = appendNaN(b.Data, len(cols))
				continue
			}
			x, err := parseFields(rec, cols, true, func(j int) string { return "column " + header[j] })
			if err != nil {
				b.markBad(i, fmt.Errorf("%s, %w", where, err))
				x = appendNaN(nil, len(cols))
			}
			b.Data = append(b.Data, x...)
		}
		if len(b.Bad) == len(records) {
			return nil, b.FirstBad()
		}
		return b, nil
	}

	width := len(records[0])
	if header != nil {
		width = len(header)
	}
	if fixed {
		width = Product(ps)
	}
	if header != nil && len(header) != width {
		return nil, fmt.Errorf("header has %d names, expected %d (one per value of a sample of shape %s)", len(header), width, ShapeString(ps))
	}
	cols := make([]int, width)
	for j := range cols {
		cols[j] = j
	}
	b := &Batch{Samples: len(records), Data: make([]float64, 0, width*len(records))}
	for i, rec := range records {
		where := fmt.Sprintf("line %d", lines[i])
		var x []float64
		err := fmt.Errorf("%s: expected %d values, got %d", where, width, len(rec))
		if len(rec) == width {
			name := func(j int) string { return "column " + strconv.Itoa(j+1) }
			if header != nil {
				name = func(j int) string { return "column " + header[j] }
			}
			if x, err = parseFields(rec, cols, true, name); err != nil {
				err = fmt.Errorf("%s, %w", where, err)
			}
		}
		if err != nil {
			b.markBad(i, err)
			x = appendNaN(nil, width)
		}
		b.Data = append(b.Data, x...)
	}
	if len(b.Bad) == len(records) {
		return nil, b.FirstBad()
	}
	sample := ps
	if !fixed {
		sample = []int{width}
		if per, ok := spec.PerSample(); ok && len(per) != 1 {
			return nil, fmt.Errorf("expected samples of shape %s, which a CSV row of %d values cannot fill", ShapeString(per), width)
		}
	}
	b.Shape = append([]int{len(records)}, sample...)
	if header != nil {
		b.Features = header
	}
	return b, nil
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
	f, err := FormatOf(name)
	if err != nil {
		return nil, fmt.Errorf("input %s: %w", name, err)
	}
	if f != CSV {
		for _, c := range []struct{ what, name string }{{"group", opt.Group}, {"key", opt.Key}} {
			if c.name != "" {
				return nil, fmt.Errorf("input %s: %s column %q: the file is not CSV, the one format with named columns", name, c.what, c.name)
			}
		}
		b, err := Read(r, name, spec, Options{KeepBad: true})
		if err != nil {
			return nil, err
		}
		t := &Table{SampleShape: b.SampleShape(), Rows: make([]Row, b.Samples)}
		for i := range t.Rows {
			row := Row{Where: "sample " + strconv.Itoa(i), Values: b.Sample(i), Err: b.Bad[i]}
			if row.Err == nil {
				row.Err = CheckFinite(row.Values)
			}
			if row.Err != nil {
				row.Values = nil
			}
			t.Rows[i] = row
		}
		return t, nil
	}
	return readCSVTable(r, name, opt)
}

func readCSVTable(r io.Reader, name string, opt TableOptions) (*Table, error) {
	records, lines, err := readRecords(r)
	if err != nil {
		return nil, fmt.Errorf("input %s: %w", name, err)
	}
	if len(records) == 0 {
		return nil, fmt.Errorf("input %s: reading the header: %w", name, io.EOF)
	}
	header := trimmed(records[0])
	if numericRow(header) {
		return nil, fmt.Errorf("input %s: expected a header row naming the columns, got a row of numbers", name)
	}
	records, lines = records[1:], lines[1:]
	if len(records) == 0 {
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
			if j != groupCol && j != keyCol && numericColumn(records, j) {
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
	t := &Table{Columns: pick(header, cols), Ignored: unread(header, cols, groupCol, keyCol), Rows: make([]Row, len(records))}
	keyLines := map[uint64]int{}
	for i, rec := range records {
		row := Row{Where: "line " + strconv.Itoa(lines[i])}
		var keyErr error
		if keyCol >= 0 {
			if keyCol < len(rec) && strings.TrimSpace(rec[keyCol]) != "" {
				row.Key = RowKey(strings.TrimSpace(rec[keyCol]))
				if line, dup := keyLines[row.Key]; dup {
					return nil, fmt.Errorf("input %s: key column %s: line %d has the key %q of line %d; a key column needs a different value on every row", name, opt.Key, lines[i], strings.TrimSpace(rec[keyCol]), line)
				}
				keyLines[row.Key] = lines[i]
			} else {
				row.Key = PlaceKey(name, row.Where)
				keyErr = fmt.Errorf("key column %s: no key, expected a value that tells the row apart", opt.Key)
			}
		}
		if len(rec) != len(header) {
			row.Err = fmt.Errorf("expected %d fields, as in the header, got %d", len(header), len(rec))
			t.Rows[i] = row
			continue
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
		t.Rows[i] = row
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

// readRecords reads every record of a CSV file with the line each starts
// on. Records may have different lengths; fields lose their leading space.
func readRecords(r io.Reader) (records [][]string, lines []int, err error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.TrimLeadingSpace = true
	for {
		rec, err := cr.Read()
		if err == io.EOF {
			return records, lines, nil
		}
		if err != nil {
			return nil, nil, err
		}
		line, _ := cr.FieldPos(0)
		records = append(records, rec)
		lines = append(lines, line)
	}
}

// parseFields reads the fields cols of rec as numbers, refusing NaN and
// infinities when finite is set; an error names the field by name(j).
func parseFields(rec []string, cols []int, finite bool, name func(j int) string) ([]float64, error) {
	x := make([]float64, len(cols))
	for n, j := range cols {
		f := strings.TrimSpace(rec[j])
		v, err := strconv.ParseFloat(f, 64)
		switch {
		case err != nil:
			return nil, fmt.Errorf("%s: %q is not a number", name(j), f)
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

// numericRow reports whether every field of rec is a number.
func numericRow(rec []string) bool {
	for _, f := range rec {
		if _, err := strconv.ParseFloat(strings.TrimSpace(f), 64); err != nil {
			return false
		}
	}
	return true
}

// numericColumn reports whether most of the first rows hold a number in
// column j.
func numericColumn(records [][]string, j int) bool {
	n, yes := 0, 0
	for _, rec := range records[:min(len(records), 20)] {
		if j >= len(rec) {
			continue
		}
		n++
		if _, err := strconv.ParseFloat(strings.TrimSpace(rec[j]), 64); err == nil {
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

func appendNaN(dst []float64, n int) []float64 {
	for range n {
		dst = append(dst, math.NaN())
	}
	return dst
}
