package gradattr

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
)

// The binary form of a Summary: what MarshalJSON keeps (the options, the
// ledger, every exact sum) without the statistics derived from the sums,
// for a summary that travels between the stages of a pipeline, where
// neither a person nor another program reads it. It holds the same exact
// values: a summary decoded from it encodes to the same JSON bytes.
//
//	magic        "apportion-summary-bin" and a zero byte
//	header       uint32 length (little-endian), then a JSON object: the
//	             options and ledger of MarshalJSON's document (format,
//	             version, model_sha256, method, settings, features,
//	             group_by, bootstrap, seed, confidence, rows,
//	             skipped_rows, incomplete_rows, skipped, keys) and
//	             groups: the group names in order
//	accumulators the whole, then each group in the header's order: rows
//	             (int64), the B bootstrap weights (int64 each), then the
//	             exact sums sum_abs, sum, sum_squares (one per feature),
//	             bootstrap_sum_abs and bootstrap_sum (feature-major, B per
//	             feature), each as a uvarint count of float64 partials
//	             and their bits (little-endian uint64s)
const summaryBinaryMagic = "apportion-summary-bin\x00"

// summaryBinaryHeader is the binary form's JSON header.
type summaryBinaryHeader struct {
	summaryHead
	Groups []string `json:"groups"`
}

// MarshalBinary encodes the summary in its binary form (see
// summaryBinaryMagic): every exact sum, count and key, without the derived
// statistics, several times smaller and faster to write and read than its
// JSON document.
func (s *Summary) MarshalBinary() ([]byte, error) {
	names := s.groupNames()
	head, err := json.Marshal(summaryBinaryHeader{summaryHead: s.head(), Groups: names})
	if err != nil {
		return nil, err
	}
	var b bytes.Buffer
	b.WriteString(summaryBinaryMagic)
	b.Write(binary.LittleEndian.AppendUint32(nil, uint32(len(head))))
	b.Write(head)
	buf := make([]byte, 0, 64)
	writeAccum := func(g *accum) {
		buf = binary.LittleEndian.AppendUint64(buf[:0], uint64(g.rows))
		for _, c := range g.bootCount {
			buf = binary.LittleEndian.AppendUint64(buf, uint64(c))
		}
		b.Write(buf)
		for _, list := range [][]expansion{g.sumAbs, g.sum, g.sumSq, g.bootAbs, g.bootSum} {
			for _, e := range list {
				buf = binary.AppendUvarint(buf[:0], uint64(len(e)))
				for _, p := range e {
					buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(p))
				}
				b.Write(buf)
			}
		}
	}
	writeAccum(s.all)
	for _, n := range names {
		writeAccum(s.groups[n])
	}
	return b.Bytes(), nil
}

// UnmarshalBinary decodes the binary form MarshalBinary writes, checking
// it whole as UnmarshalJSON checks a document. Errors wrap ErrInput.
func (s *Summary) UnmarshalBinary(raw []byte) error {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%w: binary summary: %s", ErrInput, fmt.Sprintf(format, a...))
	}
	if !bytes.HasPrefix(raw, []byte(summaryBinaryMagic)) {
		return bad("expected it to begin with %q", summaryBinaryMagic)
	}
	raw = raw[len(summaryBinaryMagic):]
	if len(raw) < 4 {
		return bad("truncated before its header")
	}
	n := binary.LittleEndian.Uint32(raw)
	raw = raw[4:]
	if uint64(n) > uint64(len(raw)) {
		return bad("header of %d bytes, %d left", n, len(raw))
	}
	var h summaryBinaryHeader
	if err := json.Unmarshal(raw[:n], &h); err != nil {
		return bad("header: %v", err)
	}
	raw = raw[n:]
	if h.Format != SummaryFormat || h.Version != SummaryVersion {
		return bad("expected format %q version %d, got format %q version %d", SummaryFormat, SummaryVersion, h.Format, h.Version)
	}
	var settings map[string]any
	if len(h.Settings) > 0 && string(h.Settings) != "null" {
		dec := json.NewDecoder(bytes.NewReader(h.Settings))
		dec.UseNumber()
		if err := dec.Decode(&settings); err != nil {
			return bad("settings: %v", err)
		}
	}
	if h.Bootstrap <= 0 {
		return bad("bootstrap %d, want ≥ 1", h.Bootstrap)
	}
	// The partials left bound the sums the accumulators may hold, before
	// any is allocated: every sum takes at least one byte.
	cells := uint64(len(h.Features)) * uint64(3+2*h.Bootstrap)
	if groups := uint64(len(h.Groups)) + 1; cells*groups > uint64(len(raw)) {
		return bad("%d features × %d replicates in %d groups do not fit in %d bytes", len(h.Features), h.Bootstrap, groups, len(raw))
	}
	t, err := NewSummary(SummaryOptions{
		Features: h.Features, Model: h.Model, Method: h.Method, Settings: settings,
		GroupBy: h.GroupBy, Bootstrap: h.Bootstrap, Seed: h.Seed,
	})
	if err != nil {
		return bad("%v", err)
	}
	if err := t.checkGroups(len(h.Groups)); err != nil {
		return bad("%v", err)
	}
	readAccum := func(what string) (*accum, error) {
		if len(raw) < 8*(1+t.b) {
			return nil, bad("%s: truncated", what)
		}
		g := t.newAccum()
		g.rows = int64(binary.LittleEndian.Uint64(raw))
		raw = raw[8:]
		if g.rows < 0 {
			return nil, bad("%s: rows %d", what, g.rows)
		}
		for i := range g.bootCount {
			g.bootCount[i] = int64(binary.LittleEndian.Uint64(raw))
			raw = raw[8:]
			if g.bootCount[i] < 0 {
				return nil, bad("%s: bootstrap weight %d is %d", what, i, g.bootCount[i])
			}
		}
		for _, list := range [][]expansion{g.sumAbs, g.sum, g.sumSq, g.bootAbs, g.bootSum} {
			for i := range list {
				k, w := binary.Uvarint(raw)
				if w <= 0 || k > uint64(len(raw)-w)/8 {
					return nil, bad("%s: truncated sum", what)
				}
				raw = raw[w:]
				parts := make([]float64, k)
				for j := range parts {
					parts[j] = math.Float64frombits(binary.LittleEndian.Uint64(raw))
					raw = raw[8:]
				}
				if list[i], err = expansionOf(parts); err != nil {
					return nil, bad("%s: %v", what, err)
				}
			}
		}
		return g, nil
	}
	if t.all, err = readAccum("overall"); err != nil {
		return err
	}
	var total int64
	for _, name := range h.Groups {
		if name == "" || t.groups[name] != nil {
			return bad("group name %q is empty or repeated", name)
		}
		g, err := readAccum(fmt.Sprintf("group %q", name))
		if err != nil {
			return err
		}
		total += g.rows
		t.groups[name] = g
	}
	if len(raw) != 0 {
		return bad("%d bytes after the last group", len(raw))
	}
	if h.Rows != t.all.rows || total > t.all.rows {
		return bad("inconsistent counts: rows %d, overall rows %d, rows in groups %d", h.Rows, t.all.rows, total)
	}
	if t.rowLedger, err = readLedger(h.Keys, h.Skipped, h.SkippedRows, t.all.rows, h.Incomplete); err != nil {
		return err
	}
	*s = *t
	return nil
}
