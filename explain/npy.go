package explain

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
)

// WriteNPY writes m as a NumPy .npy file, format version 1.0 (NEP 1,
// "A Simple File Format for NumPy Arrays"): the magic "\x93NUMPY", version
// bytes 1 0, a little-endian uint16 header length, an ASCII dict literal
// {'descr': '<f4', 'fortran_order': False, 'shape': (H, W), } padded with
// spaces and ended by '\n' so that the data starts at a multiple of 64 bytes
// (the alignment current NumPy writes; the spec requires 16), then H·W
// little-endian float32 values in C (row-major) order.
func WriteNPY(w io.Writer, m Map) error {
	if m.W < 0 || m.H < 0 || len(m.Data) != m.W*m.H {
		return fmt.Errorf("explain: npy: map has %d values for %d×%d", len(m.Data), m.W, m.H)
	}
	dict := fmt.Sprintf("{'descr': '<f4', 'fortran_order': False, 'shape': (%d, %d), }", m.H, m.W)
	const pre = 10 // magic (6) + version (2) + header length (2)
	total := pre + len(dict) + 1
	pad := (64 - total%64) % 64
	header := dict + strings.Repeat(" ", pad) + "\n"
	bw := bufio.NewWriter(w)
	bw.WriteString("\x93NUMPY")
	bw.Write([]byte{1, 0})
	binary.Write(bw, binary.LittleEndian, uint16(len(header)))
	bw.WriteString(header)
	var b [4]byte
	for _, v := range m.Data {
		binary.LittleEndian.PutUint32(b[:], math.Float32bits(v))
		bw.Write(b[:])
	}
	return bw.Flush()
}

// SaveNPY writes m to a .npy file.
func SaveNPY(path string, m Map) error {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("explain: %w", err)
	}
	if err := WriteNPY(f, m); err != nil {
		f.Close()
		return fmt.Errorf("explain: %s: %w", path, err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("explain: %s: %w", path, err)
	}
	return nil
}

// ReadNPY reads a NumPy .npy file (format version 1.0, 2.0 or 3.0, NEP 1)
// holding little-endian float32 ('<f4') in C order, of any rank, and returns
// its shape and values. It is the reader for maps written by WriteNPY and
// for golden arrays written by numpy.save; other dtypes and Fortran order are
// refused rather than converted.
func ReadNPY(r io.Reader) (shape []int, data []float32, err error) {
	br := bufio.NewReader(r)
	var pre [8]byte
	if _, err := io.ReadFull(br, pre[:]); err != nil {
		return nil, nil, fmt.Errorf("explain: npy: %w", err)
	}
	if string(pre[:6]) != "\x93NUMPY" {
		return nil, nil, fmt.Errorf("explain: npy: not a .npy file (bad magic)")
	}
	var hlen int
	switch pre[6] {
	case 1:
		var n uint16
		if err := binary.Read(br, binary.LittleEndian, &n); err != nil {
			return nil, nil, fmt.Errorf("explain: npy: %w", err)
		}
		hlen = int(n)
	case 2, 3:
		var n uint32
		if err := binary.Read(br, binary.LittleEndian, &n); err != nil {
			return nil, nil, fmt.Errorf("explain: npy: %w", err)
		}
		if n > 1<<20 {
			return nil, nil, fmt.Errorf("explain: npy: header of %d bytes", n)
		}
		hlen = int(n)
	default:
		return nil, nil, fmt.Errorf("explain: npy: format version %d.%d", pre[6], pre[7])
	}
	hb := make([]byte, hlen)
	if _, err := io.ReadFull(br, hb); err != nil {
		return nil, nil, fmt.Errorf("explain: npy header: %w", err)
	}
	h := string(hb)
	field := func(key string) (string, error) {
		i := strings.Index(h, "'"+key+"'")
		if i < 0 {
			return "", fmt.Errorf("explain: npy: header %q has no %s", h, key)
		}
		rest := strings.TrimLeft(h[i+len(key)+2:], " :")
		return rest, nil
	}
	descr, err := field("descr")
	if err != nil {
		return nil, nil, err
	}
	if !strings.HasPrefix(descr, "'<f4'") {
		return nil, nil, fmt.Errorf("explain: npy: dtype %s, want '<f4' (little-endian float32)", strings.SplitN(descr, ",", 2)[0])
	}
	fo, err := field("fortran_order")
	if err != nil {
		return nil, nil, err
	}
	if !strings.HasPrefix(fo, "False") {
		return nil, nil, fmt.Errorf("explain: npy: Fortran-order arrays are not supported")
	}
	sh, err := field("shape")
	if err != nil {
		return nil, nil, err
	}
	end := strings.IndexByte(sh, ')')
	if !strings.HasPrefix(sh, "(") || end < 0 {
		return nil, nil, fmt.Errorf("explain: npy: bad shape in header %q", h)
	}
	n := 1
	for _, f := range strings.Split(sh[1:end], ",") {
		f = strings.TrimSpace(f)
		if f == "" {
			continue
		}
		var d int
		if _, err := fmt.Sscan(f, &d); err != nil || d < 0 {
			return nil, nil, fmt.Errorf("explain: npy: bad dimension %q", f)
		}
		shape = append(shape, d)
		n *= d
		if n > 1<<30 {
			return nil, nil, fmt.Errorf("explain: npy: array of more than 2³⁰ values")
		}
	}
	raw := make([]byte, 4*n)
	if _, err := io.ReadFull(br, raw); err != nil {
		return nil, nil, fmt.Errorf("explain: npy data (%d values): %w", n, err)
	}
	data = make([]float32, n)
	for i := range data {
		data[i] = math.Float32frombits(binary.LittleEndian.Uint32(raw[4*i:]))
	}
	return shape, data, nil
}

// LoadNPY reads a .npy file with ReadNPY.
func LoadNPY(path string) (shape []int, data []float32, err error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, fmt.Errorf("explain: %w", err)
	}
	defer f.Close()
	shape, data, err = ReadNPY(f)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: %w", path, err)
	}
	return shape, data, nil
}
