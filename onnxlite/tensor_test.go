package onnxlite

import (
	"bytes"
	"encoding/binary"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"github.com/x448/float16"
	"google.golang.org/protobuf/encoding/protowire"
)

// pbTensor builds a TensorProto with the given dims and data type and the
// extra fields in rest (onnx.proto field numbers, python3-onnx 1.12.0).
func pbTensor(dt DataType, dims []int64, rest []byte) []byte {
	var b []byte
	for _, d := range dims {
		b = pbVarint(b, 1, uint64(d)) // dims, unpacked as proto2 writes them
	}
	b = pbVarint(b, 2, uint64(dt)) // data_type
	b = pbString(b, 8, "t")        // name
	return append(b, rest...)
}

func decodeTensorBytes(b []byte) (*Tensor, error) {
	return DecodeTensor(bytes.NewReader(b), DecodeOptions{})
}

func TestFloat16BitPatterns(t *testing.T) {
	// IEEE 754-2008 binary16: 1 sign bit, 5 exponent bits (bias 15), 10 fraction bits.
	cases := []struct {
		bits uint16
		want float64
	}{
		{0x3C00, 1},                  // exponent 15, fraction 0: 2^0
		{0x7BFF, 65504},              // largest finite: (2 - 2^-10) * 2^15
		{0x0001, math.Ldexp(1, -24)}, // smallest subnormal: 2^-14 * 2^-10
		{0x0400, math.Ldexp(1, -14)}, // smallest normal
		{0xC000, -2},                 // sign set, exponent 16
		{0x7C00, math.Inf(1)},        // exponent all ones, fraction 0
		{0xFC00, math.Inf(-1)},
	}
	raw := make([]byte, 0, 2*(len(cases)+2))
	for _, c := range cases {
		raw = binary.LittleEndian.AppendUint16(raw, c.bits)
	}
	raw = binary.LittleEndian.AppendUint16(raw, 0x8000) // -0
	raw = binary.LittleEndian.AppendUint16(raw, 0x7E00) // quiet NaN
	n := int64(len(cases) + 2)
	tn, err := decodeTensorBytes(pbTensor(Float16, []int64{n}, pbBytes(nil, 9, raw)))
	require.NoError(t, err)
	h := tn.Data.([]float16.Float16)
	f, err := tn.Float64s()
	require.NoError(t, err)
	for i, c := range cases {
		assert.Equal(t, c.bits, h[i].Bits())
		assert.Equal(t, c.want, f[i], "0x%04X", c.bits)
	}
	negZero := f[len(cases)]
	assert.Equal(t, 0.0, negZero)
	assert.True(t, math.Signbit(negZero), "0x8000 is -0")
	assert.True(t, math.IsNaN(f[len(cases)+1]), "0x7E00 is NaN")

	// The same bit patterns through int32_data (onnx.proto: FLOAT16 values
	// are stored as their bit patterns in int32_data), packed.
	var packed []byte
	for _, c := range cases {
		packed = protowire.AppendVarint(packed, uint64(c.bits))
	}
	tn2, err := decodeTensorBytes(pbTensor(Float16, []int64{int64(len(cases))}, pbBytes(nil, 5, packed)))
	require.NoError(t, err)
	f2, err := tn2.Float32s()
	require.NoError(t, err)
	for i, c := range cases {
		assert.Equal(t, float32(c.want), f2[i], "0x%04X", c.bits)
	}
}

func TestBFloat16BitPatterns(t *testing.T) {
	// bfloat16 is the upper half of IEEE 754 binary32: 1 sign, 8 exponent
	// (bias 127), 7 fraction bits.
	cases := []struct {
		bits uint16
		want float64
	}{
		{0x3F80, 1},
		{0x7F80, math.Inf(1)},
		{0xFF80, math.Inf(-1)},
		{0x4049, 3.140625},               // 1.5703125 * 2^1: pi rounded to 8 bits
		{0x0001, math.Ldexp(1, -133)},    // smallest subnormal: 2^-126 * 2^-7
		{0x7F7F, math.Ldexp(255, 127-7)}, // largest finite: (2 - 2^-7) * 2^127
		{0xC0A0, -5},
	}
	var raw []byte
	for _, c := range cases {
		raw = binary.LittleEndian.AppendUint16(raw, c.bits)
	}
	tn, err := decodeTensorBytes(pbTensor(BFloat16, []int64{int64(len(cases))}, pbBytes(nil, 9, raw)))
	require.NoError(t, err)
	f, err := tn.Float64s()
	require.NoError(t, err)
	for i, c := range cases {
		assert.Equal(t, BFloat16Bits(c.bits), tn.Data.([]BFloat16Bits)[i])
		assert.Equal(t, c.want, f[i], "0x%04X", c.bits)
	}
	nan, err := decodeTensorBytes(pbTensor(BFloat16, nil, pbVarint(nil, 5, 0x7FC0))) // int32_data, unpacked
	require.NoError(t, err)
	assert.True(t, math.IsNaN(float64(nan.Data.([]BFloat16Bits)[0].Float32())), "0x7FC0 is NaN")
}

func TestTypedFieldsPackedAndUnpacked(t *testing.T) {
	// float_data (4) holds FLOAT; IEEE 754 binary32 bits 0x3FC00000 = 1.5, 0xC0200000 = -2.5.
	var packedF []byte
	packedF = protowire.AppendFixed32(packedF, 0x3FC00000)
	packedF = protowire.AppendFixed32(packedF, 0xC0200000)
	var unpackedF []byte
	unpackedF = protowire.AppendTag(unpackedF, 4, protowire.Fixed32Type)
	unpackedF = protowire.AppendFixed32(unpackedF, 0x3FC00000)
	unpackedF = protowire.AppendTag(unpackedF, 4, protowire.Fixed32Type)
	unpackedF = protowire.AppendFixed32(unpackedF, 0xC0200000)
	for _, rest := range [][]byte{pbBytes(nil, 4, packedF), unpackedF} {
		tn, err := decodeTensorBytes(pbTensor(Float, []int64{2}, rest))
		require.NoError(t, err)
		assert.Equal(t, []float32{1.5, -2.5}, tn.Data)
	}

	// int32_data (5) holds negative int32 as 10-byte sign-extended varints
	// (protobuf wire format for int32), and INT8/UINT8/INT16/UINT16/BOOL too.
	neg := uint64(math.MaxUint64) // -1 sign-extended
	cases := []struct {
		dt   DataType
		vals []uint64
		want any
	}{
		{Int32, []uint64{neg, 7, 1 << 31 >> 1}, []int32{-1, 7, 1 << 30}},
		{Int8, []uint64{neg, 127, neg - 127}, []int8{-1, 127, -128}},
		{Uint8, []uint64{0, 255, 1}, []uint8{0, 255, 1}},
		{Int16, []uint64{neg - 32767, 32767, 0}, []int16{-32768, 32767, 0}},
		{Uint16, []uint64{65535, 0, 2}, []uint16{65535, 0, 2}},
		{Bool, []uint64{1, 0, 1}, []bool{true, false, true}},
	}
	for _, c := range cases {
		var packed, unpacked []byte
		for _, v := range c.vals {
			packed = protowire.AppendVarint(packed, v)
			unpacked = pbVarint(unpacked, 5, v)
		}
		for _, rest := range [][]byte{pbBytes(nil, 5, packed), unpacked} {
			tn, err := decodeTensorBytes(pbTensor(c.dt, []int64{3}, rest))
			require.NoError(t, err, "%v", c.dt)
			assert.Equal(t, c.want, tn.Data, "%v", c.dt)
		}
	}

	// int64_data (7), uint64_data (11) for UINT32 and UINT64, double_data (10).
	tn, err := decodeTensorBytes(pbTensor(Int64, []int64{2}, pbVarint(pbVarint(nil, 7, neg), 7, 1<<40)))
	require.NoError(t, err)
	assert.Equal(t, []int64{-1, 1 << 40}, tn.Data)
	tn, err = decodeTensorBytes(pbTensor(Uint64, []int64{1}, pbVarint(nil, 11, math.MaxUint64)))
	require.NoError(t, err)
	assert.Equal(t, []uint64{math.MaxUint64}, tn.Data)
	tn, err = decodeTensorBytes(pbTensor(Uint32, []int64{1}, pbVarint(nil, 11, math.MaxUint32)))
	require.NoError(t, err)
	assert.Equal(t, []uint32{math.MaxUint32}, tn.Data)
	_, err = decodeTensorBytes(pbTensor(Uint32, []int64{1}, pbVarint(nil, 11, math.MaxUint32+1)))
	assert.ErrorIs(t, err, ErrMalformed)
	// IEEE 754 binary64 0x4009_2000_0000_0000 = 3.140625 (= 0x4049 bfloat16 above).
	tn, err = decodeTensorBytes(pbTensor(Double, nil, pbBytes(nil, 10, protowire.AppendFixed64(nil, 0x4009200000000000))))
	require.NoError(t, err)
	assert.Equal(t, []float64{3.140625}, tn.Data)

	// COMPLEX64 pairs (real, imaginary) in float_data, COMPLEX128 in double_data (onnx.proto).
	tn, err = decodeTensorBytes(pbTensor(Complex64, []int64{1}, pbBytes(nil, 4, packedF)))
	require.NoError(t, err)
	assert.Equal(t, []complex64{complex(1.5, -2.5)}, tn.Data)
	var packedD []byte
	packedD = protowire.AppendFixed64(packedD, math.Float64bits(1))
	packedD = protowire.AppendFixed64(packedD, math.Float64bits(-1))
	tn, err = decodeTensorBytes(pbTensor(Complex128, []int64{1}, pbBytes(nil, 10, packedD)))
	require.NoError(t, err)
	assert.Equal(t, []complex128{complex(1, -1)}, tn.Data)

	// string_data (6).
	tn, err = decodeTensorBytes(pbTensor(String, []int64{2}, pbString(pbString(nil, 6, "ab"), 6, "")))
	require.NoError(t, err)
	assert.Equal(t, [][]byte{[]byte("ab"), {}}, tn.Data)
}

func TestRawDataLittleEndian(t *testing.T) {
	// raw_data is little-endian (onnx.proto TensorProto.raw_data).
	raw := []byte{0x01, 0x02, 0x03, 0x04, 0xFF, 0xFF, 0xFF, 0xFF}
	want := map[DataType]any{
		Int32:  []int32{0x04030201, -1},
		Uint32: []uint32{0x04030201, math.MaxUint32},
		Int16:  []int16{0x0201, 0x0403, -1, -1},
		Uint16: []uint16{0x0201, 0x0403, 0xFFFF, 0xFFFF},
		Int64:  []int64{-0xFBFCFDFF}, // 0xFFFFFFFF04030201 as two's complement
		Uint64: []uint64{0xFFFFFFFF04030201},
		Int8:   []int8{1, 2, 3, 4, -1, -1, -1, -1},
		Uint8:  raw,
		Bool:   []bool{true, true, true, true, true, true, true, true},
	}
	for dt, w := range want {
		n := int64(len(raw) / elemSize(dt))
		tn, err := decodeTensorBytes(pbTensor(dt, []int64{n}, pbBytes(nil, 9, raw)))
		require.NoError(t, err, "%v", dt)
		assert.Equal(t, w, tn.Data, "%v", dt)
	}
}

func TestElementCountMismatch(t *testing.T) {
	// A scalar (dims []) has one element (onnx.proto: "an empty list of dims
	// denotes a scalar").
	_, err := decodeTensorBytes(pbTensor(Float, nil, nil))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "float_data has 0 values, FLOAT dims [] need 1")

	_, err = decodeTensorBytes(pbTensor(Float, []int64{2, 3}, pbBytes(nil, 9, make([]byte, 20))))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "raw_data has 20 bytes, FLOAT dims [2 3] need 24")

	_, err = decodeTensorBytes(pbTensor(Int64, []int64{3}, pbVarint(nil, 7, 1)))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "int64_data has 1 values, INT64 dims [3] need 3")

	// Data in a field that does not belong to the element type.
	_, err = decodeTensorBytes(pbTensor(Float, []int64{1}, pbVarint(nil, 7, 1)))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "int64_data set on a FLOAT tensor (expected float_data)")

	// Out of range for the element type stored in int32_data.
	_, err = decodeTensorBytes(pbTensor(Uint8, []int64{1}, pbVarint(nil, 5, 256)))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "int32_data[0] = 256 out of range [0, 255] for UINT8")

	// Negative dims.
	_, err = decodeTensorBytes(pbTensor(Float, []int64{-1}, nil))
	require.ErrorIs(t, err, ErrMalformed)
	assert.Contains(t, err.Error(), "negative dimension")

	// An empty tensor (a zero dim) has no elements and decodes to an empty slice.
	tn, err := decodeTensorBytes(pbTensor(Float, []int64{3, 0}, nil))
	require.NoError(t, err)
	assert.Equal(t, []float32{}, tn.Data)
	assert.Equal(t, int64(0), tn.NumElements())

	// Unknown element type (FLOAT8E4M3FN = 17 arrived after ONNX 1.12).
	_, err = decodeTensorBytes(pbTensor(DataType(17), []int64{1}, pbBytes(nil, 9, []byte{0})))
	require.ErrorIs(t, err, ErrUnsupportedEncoding)
}

func TestNewTensorAndConversions(t *testing.T) {
	_, err := NewTensor("w", Float, []int64{2, 2}, []float64{1, 2, 3, 4})
	assert.ErrorContains(t, err, "FLOAT data must be []float32, got []float64")
	_, err = NewTensor("w", Float, []int64{2, 2}, []float32{1, 2, 3})
	assert.ErrorContains(t, err, "dims [2 2] need 4 elements, data has 3")
	_, err = NewTensor("w", Float, []int64{2, -2}, []float32{})
	assert.ErrorIs(t, err, ErrMalformed)
	_, err = NewTensor("w", Undefined, nil, []float32{1})
	assert.ErrorIs(t, err, ErrUnsupportedEncoding)

	b, err := NewTensor("b", Bool, []int64{3}, []bool{true, false, true})
	require.NoError(t, err)
	f, err := b.Float64s()
	require.NoError(t, err)
	assert.Equal(t, []float64{1, 0, 1}, f) // common practice: true = 1, false = 0
	i, err := b.Int64s()
	require.NoError(t, err)
	assert.Equal(t, []int64{1, 0, 1}, i)

	u, err := NewTensor("u", Uint64, []int64{2}, []uint64{1, math.MaxUint64})
	require.NoError(t, err)
	_, err = u.Int64s()
	assert.ErrorContains(t, err, "does not fit int64")

	// 2^24 + 1 is the first integer binary32 cannot represent (IEEE 754:
	// 24-bit significand); it rounds to even, 2^24.
	big, err := NewTensor("i", Int32, []int64{1}, []int32{1<<24 + 1})
	require.NoError(t, err)
	f32, err := big.Float32s()
	require.NoError(t, err)
	assert.Equal(t, []float32{1 << 24}, f32)

	s, err := NewTensor("s", String, []int64{1}, [][]byte{[]byte("x")})
	require.NoError(t, err)
	_, err = s.Float64s()
	assert.Error(t, err)
	_, err = s.Int64s()
	assert.Error(t, err)
	c, err := NewTensor("c", Complex64, nil, []complex64{1})
	require.NoError(t, err)
	_, err = c.Float32s()
	assert.Error(t, err)
	fl, err := NewTensor("f", Float, nil, []float32{1.5})
	require.NoError(t, err)
	_, err = fl.Int64s()
	assert.Error(t, err)
	assert.Equal(t, int64(1), fl.NumElements())
	assert.Equal(t, []int{}, fl.Shape())
}
