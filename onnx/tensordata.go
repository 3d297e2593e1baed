package onnx

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"

	"heedmap/onnx/onnxpb"
	"heedmap/tensor"
)

// ONNX TensorProto.DataType codes.
const (
	typeFloat      = 1
	typeUint8      = 2
	typeInt8       = 3
	typeUint16     = 4
	typeInt16      = 5
	typeInt32      = 6
	typeInt64      = 7
	typeString     = 8
	typeBool       = 9
	typeFloat16    = 10
	typeDouble     = 11
	typeUint32     = 12
	typeUint64     = 13
	typeComplex64  = 14
	typeComplex128 = 15
	typeBFloat16   = 16
)

// dtypeOf maps an ONNX element type to the runtime's dtype: every float
// width computes in float32, every integer width in int64. Zero means the
// type has no runtime representation (strings, complex numbers).
func dtypeOf(elem int32) tensor.DType {
	switch elem {
	case typeFloat, typeDouble, typeFloat16, typeBFloat16:
		return tensor.Float32
	case typeUint8, typeInt8, typeUint16, typeInt16, typeInt32, typeInt64, typeUint32, typeUint64:
		return tensor.Int64
	case typeBool:
		return tensor.Bool
	}
	return 0
}

// elemSize is the little-endian width of one element in raw_data.
func elemSize(elem int32) int {
	switch elem {
	case typeUint8, typeInt8, typeBool:
		return 1
	case typeUint16, typeInt16, typeFloat16, typeBFloat16:
		return 2
	case typeFloat, typeInt32, typeUint32:
		return 4
	case typeInt64, typeUint64, typeDouble:
		return 8
	}
	return 0
}

func elemName(elem int32) string {
	return onnxpb.TensorProto_DataType(elem).String()
}

// tensor converts one TensorProto. The element count the dims claim is
// checked against the data actually present before anything is allocated,
// so a hostile file cannot make the decoder allocate more than the file
// (or its external-data file) holds.
func (d *decoder) tensor(tp *onnxpb.TensorProto) (*tensor.Tensor, error) {
	name := tp.GetName()
	bad := func(format string, args ...any) error {
		return d.errorf("tensor %q: "+format, append([]any{name}, args...)...)
	}
	elem := tp.GetDataType()
	dt := dtypeOf(elem)
	if dt == 0 {
		if elem == 0 {
			return nil, bad("data_type is not set")
		}
		return nil, bad("element type %s is not supported", elemName(elem))
	}
	if tp.Segment != nil {
		return nil, bad("segmented tensors are not supported")
	}
	shape := make([]int, len(tp.Dims))
	n := 1
	for i, dim := range tp.Dims {
		if dim < 0 {
			return nil, bad("dimension %d is negative (%d)", i, dim)
		}
		if dim > math.MaxInt32 || (dim != 0 && n > math.MaxInt/int(dim)) {
			return nil, bad("dims %v overflow", tp.Dims)
		}
		shape[i] = int(dim)
		n *= int(dim)
	}
	size := elemSize(elem)
	t := &tensor.Tensor{DType: dt, Shape: shape}

	var raw []byte
	switch {
	case tp.GetDataLocation() == onnxpb.TensorProto_EXTERNAL:
		var err error
		if raw, err = d.external(tp, name, n, size); err != nil {
			return nil, err
		}
	case tp.RawData != nil:
		raw = tp.RawData
	}
	if raw != nil || tp.GetDataLocation() == onnxpb.TensorProto_EXTERNAL {
		// n*size cannot overflow: n ≤ len(raw)/size is checked first.
		if n > len(raw)/size || n*size != len(raw) {
			return nil, bad("dims %v (%s) need %s bytes but raw data has %d", tp.Dims, elemName(elem), mulString(n, size), len(raw))
		}
		return t, fillRaw(t, raw, elem, n)
	}

	// Typed fields. Each check compares the claimed count with the number
	// of values the protobuf actually carried before allocating.
	var got int
	switch elem {
	case typeFloat:
		got = len(tp.FloatData)
	case typeDouble:
		got = len(tp.DoubleData)
	case typeInt64:
		got = len(tp.Int64Data)
	case typeUint32, typeUint64:
		got = len(tp.Uint64Data)
	default: // int8/16/32, uint8/16, bool, float16 and bfloat16 bits
		got = len(tp.Int32Data)
	}
	if got != n {
		return nil, bad("dims %v (%s) need %d values but the file holds %d", tp.Dims, elemName(elem), n, got)
	}
	switch elem {
	case typeFloat:
		t.F32 = append(make([]float32, 0, n), tp.FloatData...)
	case typeDouble:
		t.F32 = make([]float32, n)
		for i, v := range tp.DoubleData {
			t.F32[i] = float32(v)
		}
	case typeFloat16, typeBFloat16:
		t.F32 = make([]float32, n)
		for i, v := range tp.Int32Data {
			if elem == typeFloat16 {
				t.F32[i] = halfToFloat32(uint16(v))
			} else {
				t.F32[i] = math.Float32frombits(uint32(uint16(v)) << 16)
			}
		}
	case typeInt64:
		t.I64 = append(make([]int64, 0, n), tp.Int64Data...)
	case typeUint32, typeUint64:
		t.I64 = make([]int64, n)
		for i, v := range tp.Uint64Data {
			if v > math.MaxInt64 {
				return nil, bad("uint64 value %d at %d does not fit int64", v, i)
			}
			t.I64[i] = int64(v)
		}
	case typeBool:
		t.I64 = make([]int64, n)
		for i, v := range tp.Int32Data {
			if v != 0 {
				t.I64[i] = 1
			}
		}
	default:
		t.I64 = make([]int64, n)
		for i, v := range tp.Int32Data {
			t.I64[i] = int64(v)
		}
	}
	return t, nil
}

func mulString(n, size int) string {
	if n > math.MaxInt/size {
		return "more than " + strconv.Itoa(math.MaxInt)
	}
	return strconv.Itoa(n * size)
}

// fillRaw decodes little-endian raw_data; len(raw) == n*elemSize(elem).
func fillRaw(t *tensor.Tensor, raw []byte, elem int32, n int) error {
	le := binary.LittleEndian
	switch elem {
	case typeFloat:
		t.F32 = make([]float32, n)
		for i := range t.F32 {
			t.F32[i] = math.Float32frombits(le.Uint32(raw[4*i:]))
		}
	case typeDouble:
		t.F32 = make([]float32, n)
		for i := range t.F32 {
			t.F32[i] = float32(math.Float64frombits(le.Uint64(raw[8*i:])))
		}
	case typeFloat16:
		t.F32 = make([]float32, n)
		for i := range t.F32 {
			t.F32[i] = halfToFloat32(le.Uint16(raw[2*i:]))
		}
	case typeBFloat16:
		t.F32 = make([]float32, n)
		for i := range t.F32 {
			t.F32[i] = math.Float32frombits(uint32(le.Uint16(raw[2*i:])) << 16)
		}
	default:
		t.I64 = make([]int64, n)
		for i := range t.I64 {
			switch elem {
			case typeUint8:
				t.I64[i] = int64(raw[i])
			case typeInt8:
				t.I64[i] = int64(int8(raw[i]))
			case typeBool:
				if raw[i] != 0 {
					t.I64[i] = 1
				}
			case typeUint16:
				t.I64[i] = int64(le.Uint16(raw[2*i:]))
			case typeInt16:
				t.I64[i] = int64(int16(le.Uint16(raw[2*i:])))
			case typeInt32:
				t.I64[i] = int64(int32(le.Uint32(raw[4*i:])))
			case typeUint32:
				t.I64[i] = int64(le.Uint32(raw[4*i:]))
			case typeInt64:
				t.I64[i] = int64(le.Uint64(raw[8*i:]))
			case typeUint64:
				v := le.Uint64(raw[8*i:])
				if v > math.MaxInt64 {
					return fmt.Errorf("onnx: uint64 value %d at %d does not fit int64", v, i)
				}
				t.I64[i] = int64(v)
			}
		}
	}
	return nil
}

// halfToFloat32 widens an IEEE 754 binary16 value.
func halfToFloat32(h uint16) float32 {
	sign := uint32(h>>15) << 31
	exp := uint32(h>>10) & 0x1f
	frac := uint32(h) & 0x3ff
	switch {
	case exp == 0x1f: // Inf or NaN
		return math.Float32frombits(sign | 0x7f800000 | frac<<13)
	case exp != 0:
		return math.Float32frombits(sign | (exp+112)<<23 | frac<<13)
	case frac == 0:
		return math.Float32frombits(sign)
	}
	// Subnormal half: normalise into a float32 normal.
	e := uint32(113)
	for frac&0x400 == 0 {
		frac <<= 1
		e--
	}
	return math.Float32frombits(sign | e<<23 | (frac&0x3ff)<<13)
}

// external reads the bytes of a tensor kept in an external file, confined to
// the model's directory by os.Root (which also refuses symlinks and ".."
// that lead outside it).
func (d *decoder) external(tp *onnxpb.TensorProto, name string, n, size int) ([]byte, error) {
	bad := func(format string, args ...any) error {
		return d.errorf("tensor %q: external data: "+format, append([]any{name}, args...)...)
	}
	var loc string
	offset, length := int64(0), int64(-1)
	for _, kv := range tp.ExternalData {
		switch kv.GetKey() {
		case "location":
			loc = kv.GetValue()
		case "offset", "length":
			v, err := strconv.ParseInt(kv.GetValue(), 10, 64)
			if err != nil || v < 0 {
				return nil, bad("%s %q is not a non-negative integer", kv.GetKey(), kv.GetValue())
			}
			if kv.GetKey() == "offset" {
				offset = v
			} else {
				length = v
			}
		}
	}
	if loc == "" {
		return nil, bad("no location")
	}
	if d.dir == "" {
		return nil, bad("%v", errNoDir)
	}
	if filepath.IsAbs(loc) || !filepath.IsLocal(filepath.FromSlash(loc)) {
		return nil, bad("location %q escapes the model's directory", loc)
	}
	if d.root == nil {
		r, err := os.OpenRoot(d.dir)
		if err != nil {
			return nil, bad("%v", err)
		}
		d.root = r
	}
	f, err := d.root.Open(filepath.FromSlash(loc))
	if err != nil {
		return nil, bad("%v", err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, bad("%v", err)
	}
	if !st.Mode().IsRegular() {
		return nil, bad("%q is not a regular file", loc)
	}
	if offset > st.Size() {
		return nil, bad("offset %d is past the end of %q (%d bytes)", offset, loc, st.Size())
	}
	if length < 0 {
		length = st.Size() - offset
	}
	if length > st.Size()-offset {
		return nil, bad("offset %d + length %d is past the end of %q (%d bytes)", offset, length, loc, st.Size())
	}
	if n > int(length)/size || int64(n*size) != length {
		return nil, bad("dims %v (%s) need %s bytes but %q provides %d", tp.Dims, elemName(tp.GetDataType()), mulString(n, size), loc, length)
	}
	buf := make([]byte, length)
	if _, err := f.ReadAt(buf, offset); err != nil && !(errors.Is(err, io.EOF) && length == 0) {
		return nil, bad("%v", err)
	}
	return buf, nil
}
