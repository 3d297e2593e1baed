package preprocess

import (
	"encoding/binary"
	"errors"
)

// Orientation is the EXIF/TIFF Orientation tag (tag 274 = 0x0112, TIFF 6.0
// §"Orientation", EXIF 2.3 §4.6.4): how the stored rows and columns relate to
// the visual top and left of the picture. Values 1–8; 0 means absent.
//
//	1 row 0 = top,    column 0 = left    (as stored)
//	2 row 0 = top,    column 0 = right   (mirror left–right)
//	3 row 0 = bottom, column 0 = right   (rotate 180°)
//	4 row 0 = bottom, column 0 = left    (mirror top–bottom)
//	5 row 0 = left,   column 0 = top     (transpose)
//	6 row 0 = right,  column 0 = top     (rotate 90° clockwise to view)
//	7 row 0 = right,  column 0 = bottom  (transverse)
//	8 row 0 = left,   column 0 = bottom  (rotate 90° counter-clockwise to view)
type Orientation int

// displayed maps a stored pixel (sx, sy) of a sw×sh image to its displayed
// position; swap reports whether the displayed size is sh×sw.
func (o Orientation) displayed(sx, sy, sw, sh int) (dx, dy int) {
	switch o {
	case 2:
		return sw - 1 - sx, sy
	case 3:
		return sw - 1 - sx, sh - 1 - sy
	case 4:
		return sx, sh - 1 - sy
	case 5:
		return sy, sx
	case 6:
		return sh - 1 - sy, sx
	case 7:
		return sh - 1 - sy, sw - 1 - sx
	case 8:
		return sy, sw - 1 - sx
	}
	return sx, sy
}

func (o Orientation) swapsAxes() bool { return o >= 5 && o <= 8 }

// jpegOrientation scans a JPEG stream's marker segments up to the first
// start-of-scan for an APP1 "Exif" segment and returns its IFD0 Orientation,
// or 0 when there is none. A malformed EXIF block is an error: a photo whose
// orientation cannot be read would otherwise be silently explained sideways.
func jpegOrientation(b []byte) (Orientation, error) {
	if len(b) < 4 || b[0] != 0xFF || b[1] != 0xD8 {
		return 0, errors.New("not a JPEG stream")
	}
	i := 2
	for i+4 <= len(b) {
		if b[i] != 0xFF {
			return 0, errors.New("JPEG marker expected")
		}
		marker := b[i+1]
		if marker == 0xFF { // fill byte
			i++
			continue
		}
		if marker == 0xD8 || marker == 0x01 || (marker >= 0xD0 && marker <= 0xD7) {
			i += 2
			continue
		}
		if marker == 0xDA || marker == 0xD9 { // start of scan / end of image
			return 0, nil
		}
		n := int(binary.BigEndian.Uint16(b[i+2:]))
		if n < 2 || i+2+n > len(b) {
			return 0, errors.New("truncated JPEG segment")
		}
		seg := b[i+4 : i+2+n]
		if marker == 0xE1 && len(seg) >= 6 && string(seg[:6]) == "Exif\x00\x00" {
			return tiffOrientation(seg[6:])
		}
		i += 2 + n
	}
	return 0, nil
}

// tiffOrientation reads the Orientation entry of IFD0 of a TIFF-structured
// block (the EXIF payload, or a TIFF file itself).
func tiffOrientation(t []byte) (Orientation, error) {
	if len(t) < 8 {
		return 0, errors.New("EXIF: short TIFF header")
	}
	var bo binary.ByteOrder
	switch string(t[:2]) {
	case "II":
		bo = binary.LittleEndian
	case "MM":
		bo = binary.BigEndian
	default:
		return 0, errors.New("EXIF: bad byte-order mark")
	}
	if bo.Uint16(t[2:]) != 42 {
		return 0, errors.New("EXIF: bad TIFF magic")
	}
	off := int(bo.Uint32(t[4:]))
	if off < 8 || off+2 > len(t) {
		return 0, errors.New("EXIF: IFD0 offset out of range")
	}
	n := int(bo.Uint16(t[off:]))
	if off+2+12*n > len(t) {
		return 0, errors.New("EXIF: IFD0 truncated")
	}
	for k := 0; k < n; k++ {
		e := t[off+2+12*k:]
		if bo.Uint16(e) != 0x0112 {
			continue
		}
		typ, count := bo.Uint16(e[2:]), bo.Uint32(e[4:])
		if typ != 3 || count != 1 { // SHORT, one value, stored left-justified in the value field
			return 0, errors.New("EXIF: Orientation entry is not one SHORT")
		}
		v := Orientation(bo.Uint16(e[8:]))
		if v < 1 || v > 8 {
			return 0, errors.New("EXIF: Orientation value outside 1–8")
		}
		return v, nil
	}
	return 0, nil
}
