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
