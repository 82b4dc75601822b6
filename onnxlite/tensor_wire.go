package onnxlite

import (
	"encoding/binary"
	"fmt"
	"math"

	"google.golang.org/protobuf/encoding/protowire"

	"github.com/x448/float16"
)

// A TensorProto on the wire: decoding its fields into a Tensor, and the
// little-endian raw_data of its elements both ways.

// elemSize is the little-endian raw_data size of one element of dt, or 0 for
// STRING and unknown types.
func elemSize(dt DataType) int {
	switch dt {
	case Uint8, Int8, Bool:
		return 1
	case Uint16, Int16, Float16, BFloat16:
		return 2
	case Float, Int32, Uint32:
		return 4
	case Double, Int64, Uint64, Complex64:
		return 8
	case Complex128:
		return 16
	}
	return 0
}

// fromRaw decodes n little-endian elements of dt from raw, whose length the
// caller has checked to be n*elemSize(dt).
func fromRaw(dt DataType, raw []byte, n int) any {
	le := binary.LittleEndian
	switch dt {
	case Float:
		out := make([]float32, n)
		for i := range out {
			out[i] = math.Float32frombits(le.Uint32(raw[4*i:]))
		}
		return out
	case Double:
		out := make([]float64, n)
		for i := range out {
			out[i] = math.Float64frombits(le.Uint64(raw[8*i:]))
		}
		return out
	case Float16:
		out := make([]float16.Float16, n)
		for i := range out {
			out[i] = float16.Frombits(le.Uint16(raw[2*i:]))
		}
		return out
	case BFloat16:
		out := make([]BFloat16Bits, n)
		for i := range out {
			out[i] = BFloat16Bits(le.Uint16(raw[2*i:]))
		}
		return out
	case Int8:
		out := make([]int8, n)
		for i := range out {
			out[i] = int8(raw[i])
		}
		return out
	case Uint8:
		return append(make([]uint8, 0, n), raw[:n]...)
	case Int16:
		out := make([]int16, n)
		for i := range out {
			out[i] = int16(le.Uint16(raw[2*i:]))
		}
		return out
	case Uint16:
		out := make([]uint16, n)
		for i := range out {
			out[i] = le.Uint16(raw[2*i:])
		}
		return out
	case Int32:
		out := make([]int32, n)
		for i := range out {
			out[i] = int32(le.Uint32(raw[4*i:]))
		}
		return out
	case Uint32:
		out := make([]uint32, n)
		for i := range out {
			out[i] = le.Uint32(raw[4*i:])
		}
		return out
	case Int64:
		out := make([]int64, n)
		for i := range out {
			out[i] = int64(le.Uint64(raw[8*i:]))
		}
		return out
	case Uint64:
		out := make([]uint64, n)
		for i := range out {
			out[i] = le.Uint64(raw[8*i:])
		}
		return out
	case Bool:
		out := make([]bool, n)
		for i := range out {
			out[i] = raw[i] != 0
		}
		return out
	case Complex64:
		out := make([]complex64, n)
		for i := range out {
			re := math.Float32frombits(le.Uint32(raw[8*i:]))
			im := math.Float32frombits(le.Uint32(raw[8*i+4:]))
			out[i] = complex(re, im)
		}
		return out
	case Complex128:
		out := make([]complex128, n)
		for i := range out {
			re := math.Float64frombits(le.Uint64(raw[16*i:]))
			im := math.Float64frombits(le.Uint64(raw[16*i+8:]))
			out[i] = complex(re, im)
		}
		return out
	}
	return nil
}

// toRaw encodes the numeric data of t little-endian, after checking the slice
// type and length against DType and Dims.
func toRaw(t *Tensor) ([]byte, error) {
	if err := checkTensor(t); err != nil {
		return nil, err
	}
	le := binary.LittleEndian
	var b []byte
	switch d := t.Data.(type) {
	case []float32:
		for _, v := range d {
			b = le.AppendUint32(b, math.Float32bits(v))
		}
	case []float64:
		for _, v := range d {
			b = le.AppendUint64(b, math.Float64bits(v))
		}
	case []float16.Float16:
		for _, v := range d {
			b = le.AppendUint16(b, v.Bits())
		}
	case []BFloat16Bits:
		for _, v := range d {
			b = le.AppendUint16(b, uint16(v))
		}
	case []int8:
		for _, v := range d {
			b = append(b, byte(v))
		}
	case []uint8:
		b = append(b, d...)
	case []int16:
		for _, v := range d {
			b = le.AppendUint16(b, uint16(v))
		}
	case []uint16:
		for _, v := range d {
			b = le.AppendUint16(b, v)
		}
	case []int32:
		for _, v := range d {
			b = le.AppendUint32(b, uint32(v))
		}
	case []uint32:
		for _, v := range d {
			b = le.AppendUint32(b, v)
		}
	case []int64:
		for _, v := range d {
			b = le.AppendUint64(b, uint64(v))
		}
	case []uint64:
		for _, v := range d {
			b = le.AppendUint64(b, v)
		}
	case []bool:
		for _, v := range d {
			if v {
				b = append(b, 1)
			} else {
				b = append(b, 0)
			}
		}
	case []complex64:
		for _, v := range d {
			b = le.AppendUint32(b, math.Float32bits(real(v)))
			b = le.AppendUint32(b, math.Float32bits(imag(v)))
		}
	case []complex128:
		for _, v := range d {
			b = le.AppendUint64(b, math.Float64bits(real(v)))
			b = le.AppendUint64(b, math.Float64bits(imag(v)))
		}
	default:
		return nil, fmt.Errorf("tensor %q: %v has no raw_data encoding", t.Name, t.DType)
	}
	if b == nil {
		b = []byte{}
	}
	return b, nil
}

// tensorFields collects the fields of a TensorProto before any element slice
// is allocated, so that counts can be checked against the dims first.
type tensorFields struct {
	dims                                  []int64
	dtype                                 int32
	name, doc                             string
	raw                                   []byte
	hasRaw, segment                       bool
	floatD, int32D, int64D, dblD, uint64D [][]byte // packed chunks
	strD                                  [][]byte
	external                              [][2]string
	location                              int32
}

// tensor decodes a TensorProto.
func (d *decoder) tensor(path string, buf []byte) (*Tensor, error) {
	var tf tensorFields
	err := fields(path, buf, func(f field) error {
		var err error
		switch f.num {
		case 1:
			var chunks [][]byte
			chunks, err = packedChunk(path, "dims", f, protowire.VarintType, nil)
			for _, c := range chunks {
				for len(c) > 0 && err == nil {
					v, m := protowire.ConsumeVarint(c)
					if m < 0 {
						return wireErr(path+".dims", m)
					}
					c = c[m:]
					if len(tf.dims) >= d.lim.MaxRank {
						return fmt.Errorf("%s: %w", path, &LimitError{Limit: "MaxRank", Value: int64(len(tf.dims)) + 1, Max: int64(d.lim.MaxRank)})
					}
					tf.dims = append(tf.dims, int64(v))
				}
			}
		case 2:
			tf.dtype, err = f.int32v(path, "data_type")
		case 3:
			err = f.want(path, "segment", protowire.BytesType)
			tf.segment = true
		case 4:
			tf.floatD, err = packedChunk(path, "float_data", f, protowire.Fixed32Type, tf.floatD)
		case 5:
			tf.int32D, err = packedChunk(path, "int32_data", f, protowire.VarintType, tf.int32D)
		case 6:
			err = f.want(path, "string_data", protowire.BytesType)
			tf.strD = append(tf.strD, f.val)
		case 7:
			tf.int64D, err = packedChunk(path, "int64_data", f, protowire.VarintType, tf.int64D)
		case 8:
			tf.name, err = f.str(path, "name")
		case 9:
			err = f.want(path, "raw_data", protowire.BytesType)
			tf.raw, tf.hasRaw = f.val, true
		case 10:
			tf.dblD, err = packedChunk(path, "double_data", f, protowire.Fixed64Type, tf.dblD)
		case 11:
			tf.uint64D, err = packedChunk(path, "uint64_data", f, protowire.VarintType, tf.uint64D)
		case 12:
			tf.doc, err = f.str(path, "doc_string")
		case 13:
			p := index(path, "external_data", len(tf.external))
			if err = f.want(p, "external_data", protowire.BytesType); err == nil {
				var k, v string
				k, v, err = stringPair(p, f.val)
				tf.external = append(tf.external, [2]string{k, v})
			}
		case 14:
			tf.location, err = f.int32v(path, "data_location")
		}
		return err
	})
	if err != nil {
		return nil, err
	}
	if tf.name != "" {
		path += fmt.Sprintf(" %q", tf.name)
	}
	t := &Tensor{Name: tf.name, DType: DataType(tf.dtype), Dims: tf.dims, DocString: tf.doc}
	if tf.segment {
		return nil, fmt.Errorf("%s: segmented tensors are not supported: %w", path, ErrUnsupportedEncoding)
	}
	if sliceType(t.DType) == nil {
		return nil, fmt.Errorf("%s: element type %v: %w", path, t.DType, ErrUnsupportedEncoding)
	}
	n, err := elementCount(tf.dims, d.lim.MaxTensorElements)
	if err != nil {
		return nil, fmt.Errorf("%s: dims %v: %w", path, tf.dims, err)
	}
	t.Data, err = d.tensorData(path, t.DType, n, &tf)
	if err != nil {
		return nil, err
	}
	return t, nil
}

// typedCounts returns the element counts of the typed data fields, by name.
func (tf *tensorFields) typedCounts() map[string]int64 {
	c := map[string]int64{}
	sum := func(chunks [][]byte, size int) int64 {
		var n int64
		for _, ch := range chunks {
			n += int64(len(ch) / size)
		}
		return n
	}
	c["float_data"] = sum(tf.floatD, 4)
	c["double_data"] = sum(tf.dblD, 8)
	c["int32_data"] = varintCount(tf.int32D)
	c["int64_data"] = varintCount(tf.int64D)
	c["uint64_data"] = varintCount(tf.uint64D)
	c["string_data"] = int64(len(tf.strD))
	return c
}

// typedField is the TensorProto field that holds elements of dt when
// raw_data is not used, and how many field values make one element.
func typedField(dt DataType) (string, int64) {
	switch dt {
	case Float:
		return "float_data", 1
	case Complex64:
		return "float_data", 2
	case Double:
		return "double_data", 1
	case Complex128:
		return "double_data", 2
	case Int32, Int8, Uint8, Int16, Uint16, Float16, BFloat16, Bool:
		return "int32_data", 1
	case Int64:
		return "int64_data", 1
	case Uint32, Uint64:
		return "uint64_data", 1
	case String:
		return "string_data", 1
	}
	return "", 0
}

func (d *decoder) tensorData(path string, dt DataType, n int64, tf *tensorFields) (any, error) {
	counts := tf.typedCounts()
	want, per := typedField(dt)
	external := tf.location == 1
	if tf.location != 0 && tf.location != 1 {
		return nil, fmt.Errorf("%s: data_location %d: %w", path, tf.location, ErrUnsupportedEncoding)
	}
	for name, c := range counts {
		if c == 0 {
			continue
		}
		if tf.hasRaw || external {
			src := "raw_data"
			if external {
				src = "external data"
			}
			return nil, malformed(path, "both %s and %s are set", src, name)
		}
		if name != want {
			return nil, malformed(path, "%s set on a %v tensor (expected %s)", name, dt, want)
		}
	}
	size := elemSize(dt)
	if external || tf.hasRaw {
		if dt == String {
			return nil, malformed(path, "STRING tensors cannot use raw_data or external data")
		}
		if external && tf.hasRaw {
			return nil, malformed(path, "both raw_data and external data are set")
		}
		if n > math.MaxInt64/int64(size) {
			return nil, fmt.Errorf("%s: %w", path, &LimitError{Limit: "MaxInitializerBytes", Value: math.MaxInt64, Max: d.lim.MaxInitializerBytes})
		}
		wantBytes := n * int64(size)
		raw := tf.raw
		if !external && int64(len(raw)) != wantBytes {
			return nil, malformed(path, "raw_data has %d bytes, %v dims %v need %d (%d elements of %d bytes)",
				len(raw), dt, tf.dims, wantBytes, n, size)
		}
		if err := d.addPayload(wantBytes); err != nil {
			return nil, fmt.Errorf("%s: %w", path, err)
		}
		if external {
			var err error
			raw, err = d.loadExternal(path, tf.external, wantBytes)
			if err != nil {
				return nil, err
			}
		}
		return fromRaw(dt, raw, int(n)), nil
	}
	got := counts[want]
	if got != n*per {
		return nil, malformed(path, "%s has %d values, %v dims %v need %d", want, got, dt, tf.dims, n*per)
	}
	if dt == String {
		var total int64
		for _, s := range tf.strD {
			total += int64(len(s))
		}
		if err := d.addPayload(total); err != nil {
			return nil, fmt.Errorf("%s: %w", path, err)
		}
		out := make([][]byte, n)
		for i, s := range tf.strD {
			out[i] = append([]byte{}, s...)
		}
		return out, nil
	}
	if n > math.MaxInt64/int64(size) {
		return nil, fmt.Errorf("%s: %w", path, &LimitError{Limit: "MaxInitializerBytes", Value: math.MaxInt64, Max: d.lim.MaxInitializerBytes})
	}
	if err := d.addPayload(n * int64(size)); err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	switch want {
	case "float_data":
		vals := fixed32Floats(tf.floatD, n*per)
		if dt == Float {
			return vals, nil
		}
		out := make([]complex64, n)
		for i := range out {
			out[i] = complex(vals[2*i], vals[2*i+1])
		}
		return out, nil
	case "double_data":
		vals := make([]float64, 0, n*per)
		for _, c := range tf.dblD {
			for i := 0; i+8 <= len(c); i += 8 {
				vals = append(vals, math.Float64frombits(binary.LittleEndian.Uint64(c[i:])))
			}
		}
		if dt == Double {
			return vals, nil
		}
		out := make([]complex128, n)
		for i := range out {
			out[i] = complex(vals[2*i], vals[2*i+1])
		}
		return out, nil
	case "int64_data", "uint64_data":
		chunks := tf.int64D
		if want == "uint64_data" {
			chunks = tf.uint64D
		}
		vals, err := varints(path+"."+want, chunks, n)
		if err != nil {
			return nil, err
		}
		switch dt {
		case Int64:
			return convert(vals, func(v uint64) int64 { return int64(v) }), nil
		case Uint64:
			return vals, nil
		}
		out := make([]uint32, n)
		for i, v := range vals {
			if v > math.MaxUint32 {
				return nil, malformed(path, "uint64_data[%d] = %d out of range for UINT32", i, v)
			}
			out[i] = uint32(v)
		}
		return out, nil
	}
	// int32_data
	vals, err := varints(path+".int32_data", tf.int32D, n)
	if err != nil {
		return nil, err
	}
	lo, hi := intRange(dt)
	for i, u := range vals {
		if v := int64(u); v < lo || v > hi {
			return nil, malformed(path, "int32_data[%d] = %d out of range [%d, %d] for %v", i, v, lo, hi, dt)
		}
	}
	switch dt {
	case Int32:
		return convert(vals, func(v uint64) int32 { return int32(v) }), nil
	case Int8:
		return convert(vals, func(v uint64) int8 { return int8(v) }), nil
	case Uint8:
		return convert(vals, func(v uint64) uint8 { return uint8(v) }), nil
	case Int16:
		return convert(vals, func(v uint64) int16 { return int16(v) }), nil
	case Uint16:
		return convert(vals, func(v uint64) uint16 { return uint16(v) }), nil
	case Float16:
		return convert(vals, func(v uint64) float16.Float16 { return float16.Frombits(uint16(v)) }), nil
	case BFloat16:
		return convert(vals, func(v uint64) BFloat16Bits { return BFloat16Bits(v) }), nil
	}
	return convert(vals, func(v uint64) bool { return v != 0 }), nil
}

// fixed32Floats decodes the n little-endian float32 values of packed fixed32
// chunks, whose lengths packedChunk has checked to be multiples of 4.
func fixed32Floats(chunks [][]byte, n int64) []float32 {
	out := make([]float32, 0, n)
	for _, c := range chunks {
		for i := 0; i+4 <= len(c); i += 4 {
			out = append(out, math.Float32frombits(binary.LittleEndian.Uint32(c[i:])))
		}
	}
	return out
}

// varints decodes n varints from packed chunks whose varint count the caller
// has checked.
func varints(path string, chunks [][]byte, n int64) ([]uint64, error) {
	out := make([]uint64, 0, n)
	for _, c := range chunks {
		for len(c) > 0 {
			v, m := protowire.ConsumeVarint(c)
			if m < 0 {
				return nil, wireErr(path, m)
			}
			out = append(out, v)
			c = c[m:]
		}
	}
	if int64(len(out)) != n {
		return nil, malformed(path, "decoded %d values, want %d", len(out), n)
	}
	return out, nil
}
