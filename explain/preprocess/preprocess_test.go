package preprocess

import (
	"bytes"
	"context"
	"encoding/binary"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"image/png"
	"math"
	"testing"

	"golang.org/x/image/tiff"

	"heedmap/explain"
)

// centroid of channel 0 of a model-space picture, in continuous coordinates
// (pixel centres at i+0.5).
func centroid(m *RGB) (float64, float64) {
	var sx, sy, s float64
	for y := 0; y < m.H; y++ {
		for x := 0; x < m.W; x++ {
			v := float64(m.Pix[3*(y*m.W+x)])
			sx += v * (float64(x) + 0.5)
			sy += v * (float64(y) + 0.5)
			s += v
		}
	}
	return sx / s, sy / s
}

// A single bright pixel must come back to where it was: its model-space
// centroid (the resampling kernel is symmetric, so it preserves centroids
// away from the edges) mapped back through the Placement lands within one
// source pixel of the pixel's centre; and the ToOriginal image of the model
// picture has its centroid there too. Every mode, several aspect ratios, up-
// and down-sampling.
func TestMarkedPixelRoundTrip(t *testing.T) {
	sizes := [][2]int{{90, 60}, {60, 90}, {64, 64}, {37, 101}, {300, 200}, {20, 12}, {17, 40}}
	models := [][2]int{{32, 32}, {48, 40}}
	for _, mode := range []ResizeMode{Stretch, Crop, Pad} {
		for _, s := range sizes {
			for _, m := range models {
				p, err := New(Config{Width: m[0], Height: m[1], Resize: mode})
				if err != nil {
					t.Fatal(err)
				}
				// Marked pixel in the central region, which every mode keeps.
				px, py := s[0]*2/5+1, s[1]*3/5-1
				img := image.NewGray(image.Rect(0, 0, s[0], s[1]))
				img.SetGray(px, py, color.Gray{255})
				in, err := p.Apply(context.Background(), img)
				if err != nil {
					t.Fatal(err)
				}
				// Invert the colour so the background is 0 and padding (black) is 0 too.
				cx, cy := centroid(in.Seen)
				ox, oy := in.Placement.ToSourcePoint(cx, cy)
				name := fmt.Sprintf("%s %dx%d->%dx%d", mode, s[0], s[1], m[0], m[1])
				if math.Abs(ox-(float64(px)+0.5)) > 1 || math.Abs(oy-(float64(py)+0.5)) > 1 {
					t.Errorf("%s: marked pixel (%d,%d) came back at (%.2f,%.2f)", name, px, py, ox-0.5, oy-0.5)
				}
				mp := explain.Map{W: m[0], H: m[1], Data: make([]float32, m[0]*m[1])}
				for i := range mp.Data {
					mp.Data[i] = in.Seen.Pix[3*i]
				}
				vals, seen := in.Placement.ToOriginal(mp)
				back := &RGB{W: s[0], H: s[1], Pix: make([]float32, 3*len(vals))}
				for i, v := range vals {
					if seen[i] {
						back.Pix[3*i] = v
					}
				}
				bx, by := centroid(back)
				if math.Abs(bx-(float64(px)+0.5)) > 1 || math.Abs(by-(float64(py)+0.5)) > 1 {
					t.Errorf("%s: ToOriginal centroid (%.2f,%.2f), want (%d,%d)", name, bx-0.5, by-0.5, px, py)
				}
				if !seen[py*s[0]+px] {
					t.Errorf("%s: marked pixel reported unseen", name)
				}
			}
		}
	}
}

// Crop of a 2:1 picture to a square model keeps the middle half of the
// columns: the outer quarters are unseen, analytically.
func TestCropUnseen(t *testing.T) {
	pl, err := NewPlacement(100, 50, 50, 50, Crop)
	if err != nil {
		t.Fatal(err)
	}
	if pl.ScaledW != 100 || pl.ScaledH != 50 || pl.OffX != -25 || pl.OffY != 0 {
		t.Fatalf("placement %+v", pl)
	}
	all := make([]bool, 100*50)
	for i := range all {
		all[i] = true
	}
	f, err := pl.UnseenFraction(all, 100, 50)
	if err != nil || f != 0.5 {
		t.Errorf("unseen fraction %v (%v), want 0.5", f, err)
	}
	_, seen := pl.ToOriginal(explain.Map{W: 50, H: 50, Data: make([]float32, 2500)})
	for x := 0; x < 100; x++ {
		want := x >= 25 && x < 75
		if seen[10*100+x] != want {
			t.Errorf("column %d seen=%v, want %v", x, seen[10*100+x], want)
		}
	}
	// A mask on the left quarter only is fully unseen; in model space it is empty.
	left := make([]bool, 100*50)
	for y := 0; y < 50; y++ {
		for x := 0; x < 25; x++ {
			left[y*100+x] = true
		}
	}
	if f, _ := pl.UnseenFraction(left, 100, 50); f != 1 {
		t.Errorf("left-quarter unseen fraction %v, want 1", f)
	}
	mm, err := pl.MaskToModel(left, 100, 50)
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range mm {
		if v {
			t.Fatalf("model pixel %d set from a cropped-away mask", i)
		}
	}
}

// Pad of a 1:2 picture: the picture occupies the middle half of the columns;
// a full mask maps to exactly that band, and nothing is unseen.
func TestPadMaskToModel(t *testing.T) {
	pl, err := NewPlacement(30, 60, 40, 40, Pad)
	if err != nil {
		t.Fatal(err)
	}
	if pl.ScaledW != 20 || pl.ScaledH != 40 || pl.OffX != 10 || pl.OffY != 0 {
		t.Fatalf("placement %+v", pl)
	}
	all := make([]bool, 30*60)
	for i := range all {
		all[i] = true
	}
	mm, err := pl.MaskToModel(all, 30, 60)
	if err != nil {
		t.Fatal(err)
	}
	for y := 0; y < 40; y++ {
		for x := 0; x < 40; x++ {
			if want := x >= 10 && x < 30; mm[y*40+x] != want {
				t.Fatalf("model (%d,%d) = %v, want %v", x, y, mm[y*40+x], want)
			}
		}
	}
	if f, _ := pl.UnseenFraction(all, 30, 60); f != 0 {
		t.Errorf("pad unseen fraction %v, want 0", f)
	}
	if _, err := pl.MaskToModel(all, 31, 60); err == nil {
		t.Error("mask size mismatch not reported")
	}
}

// Mean/std normalisation and channel order: a uniform picture of colour c
// gives model values (c − mean)/std in the declared channel order. Mean/std
// are the ImageNet statistics (common practice).
func TestNormalisation(t *testing.T) {
	mean, std := []float32{0.485, 0.456, 0.406}, []float32{0.229, 0.224, 0.225}
	c := color.RGBA{R: 200, G: 100, B: 50, A: 255}
	img := image.NewRGBA(image.Rect(0, 0, 10, 7))
	for i := 0; i < len(img.Pix); i += 4 {
		img.Pix[i], img.Pix[i+1], img.Pix[i+2], img.Pix[i+3] = c.R, c.G, c.B, c.A
	}
	for _, order := range []string{"RGB", "BGR"} {
		p, err := New(Config{Width: 5, Height: 5, Mean: mean, Std: std, Channels: order, Resize: Pad})
		if err != nil {
			t.Fatal(err)
		}
		in, err := p.Apply(context.Background(), img)
		if err != nil {
			t.Fatal(err)
		}
		rgb := []float64{200. / 255, 100. / 255, 50. / 255}
		if order == "BGR" {
			rgb[0], rgb[2] = rgb[2], rgb[0]
		}
		for ch := 0; ch < 3; ch++ {
			want := (rgb[ch] - float64(mean[ch])) / float64(std[ch])
			got := float64(in.Tensor.F32[ch*25+2*5+2])
			if math.Abs(got-want) > 1e-4 {
				t.Errorf("%s channel %d: %v, want %v", order, ch, got, want)
			}
			// Padding rows (the picture is 10×7 → 5×4 (rounded 3.5 → 4) on 5×5): pad is the mean, so zero.
			if pad := in.Tensor.F32[ch*25+4*5+2]; math.Abs(float64(pad)) > 1e-6 {
				t.Errorf("%s channel %d: pad value %v, want 0", order, ch, pad)
			}
		}
	}
}

func TestResolveLayout(t *testing.T) {
	c, err := Config{}.Resolve([]int{1, 3, 224, 200})
	if err != nil || c.Layout != "NCHW" || c.Width != 200 || c.Height != 224 {
		t.Errorf("NCHW: %+v %v", c, err)
	}
	c, err = Config{}.Resolve([]int{-1, 128, 96, 3})
	if err != nil || c.Layout != "NHWC" || c.Width != 96 || c.Height != 128 {
		t.Errorf("NHWC: %+v %v", c, err)
	}
	if _, err = (Config{}).Resolve([]int{1, 3, 224, 3}); err == nil {
		t.Error("ambiguous layout accepted")
	}
	if _, err = (Config{}).Resolve([]int{1, 3, -1, -1}); err == nil {
		t.Error("dynamic size without width/height accepted")
	}
	if c, err = (Config{Width: 64, Height: 32}).Resolve([]int{1, 3, -1, -1}); err != nil || c.Width != 64 {
		t.Errorf("explicit size: %+v %v", c, err)
	}
}

// Colour rule (package comment): CMYK by R = (1−C)(1−K) etc.; alpha over
// white; 8-bit v → v/255 and 16-bit v → v/65535; gray replicated; YCbCr by
// the JFIF (ITU-T T.871 §7) full-range equations
// R = Y + 1.402(Cr−128), G = Y − 0.344136(Cb−128) − 0.714136(Cr−128),
// B = Y + 1.772(Cb−128).
func TestColourRule(t *testing.T) {
	near := func(name string, got [3]float32, want [3]float64, tol float64) {
		t.Helper()
		for i := range got {
			if math.Abs(float64(got[i])-want[i]) > tol {
				t.Errorf("%s: got %v, want %v", name, got, want)
				return
			}
		}
	}
	for _, k := range []color.CMYK{{0, 0, 0, 0}, {255, 0, 0, 0}, {10, 200, 30, 100}, {0, 0, 0, 255}, {128, 64, 32, 16}} {
		c, m, y, kk := float64(k.C)/255, float64(k.M)/255, float64(k.Y)/255, float64(k.K)/255
		near(fmt.Sprint("cmyk ", k), ColorToRGB(k), [3]float64{(1 - c) * (1 - kk), (1 - m) * (1 - kk), (1 - y) * (1 - kk)}, 2.0/65535)
	}
	near("gray", ColorToRGB(color.Gray{77}), [3]float64{77. / 255, 77. / 255, 77. / 255}, 1e-7)
	near("gray16", ColorToRGB(color.Gray16{12345}), [3]float64{12345. / 65535, 12345. / 65535, 12345. / 65535}, 1e-7)
	near("rgba64", ColorToRGB(color.RGBA64{1000, 30000, 65535, 65535}), [3]float64{1000. / 65535, 30000. / 65535, 1}, 1e-7)
	// Straight-alpha red at 25 % opacity over white: 0.25·1 + 0.75·1 = 1 for red, 0.75 for green/blue.
	near("nrgba", ColorToRGB(color.NRGBA{255, 0, 0, 64}), [3]float64{1, 1 - 64./255, 1 - 64./255}, 1e-3)
	near("transparent", ColorToRGB(color.NRGBA{0, 0, 0, 0}), [3]float64{1, 1, 1}, 0)
	for _, yc := range []color.YCbCr{{128, 128, 128}, {200, 90, 160}, {50, 200, 60}, {235, 128, 128}} {
		Y, cb, cr := float64(yc.Y), float64(yc.Cb)-128, float64(yc.Cr)-128
		want := [3]float64{Y + 1.402*cr, Y - 0.344136*cb - 0.714136*cr, Y + 1.772*cb}
		for i := range want {
			want[i] = math.Min(math.Max(want[i], 0), 255) / 255
		}
		near(fmt.Sprint("ycbcr ", yc), ColorToRGB(yc), want, 1.5/255)
	}
	pal := image.NewPaletted(image.Rect(0, 0, 2, 1), color.Palette{color.RGBA{1, 2, 3, 255}, color.RGBA{250, 128, 0, 255}})
	pal.SetColorIndex(1, 0, 1)
	rgb := ToRGB(pal)
	near("paletted", rgb.At(1, 0), [3]float64{250. / 255, 128. / 255, 0}, 1e-7)
}

// TIFF, BMP and 16-bit PNG decode through the same rule; errors name the file.
func TestDecodeFormats(t *testing.T) {
	g := image.NewGray16(image.Rect(0, 0, 3, 2))
	g.SetGray16(2, 1, color.Gray16{0xABCD})
	var buf bytes.Buffer
	if err := png.Encode(&buf, g); err != nil {
		t.Fatal(err)
	}
	src, err := Decode(buf.Bytes(), "g16.png")
	if err != nil {
		t.Fatal(err)
	}
	if got := ToRGB(src.Image).At(2, 1); math.Abs(float64(got[1])-0xABCD/65535.) > 1e-7 {
		t.Errorf("16-bit PNG: %v", got)
	}
	buf.Reset()
	c := image.NewCMYK(image.Rect(0, 0, 2, 2))
	c.Set(1, 1, color.CMYK{0, 255, 255, 0})
	rgba := image.NewRGBA(c.Bounds())
	rgba.Set(1, 1, color.RGBA{255, 0, 0, 255})
	if err := tiff.Encode(&buf, rgba, nil); err != nil {
		t.Fatal(err)
	}
	src, err = Decode(buf.Bytes(), "red.tiff")
	if err != nil || src.Format != "tiff" {
		t.Fatalf("tiff: %v %v", src, err)
	}
	if got := ToRGB(src.Image).At(1, 1); got != [3]float32{1, 0, 0} {
		t.Errorf("tiff pixel %v", got)
	}
	// BMP: a hand-written 2×1 24-bit bottom-up file (BITMAPINFOHEADER, Microsoft BMP format).
	bmp := []byte{'B', 'M', 62, 0, 0, 0, 0, 0, 0, 0, 54, 0, 0, 0,
		40, 0, 0, 0, 2, 0, 0, 0, 1, 0, 0, 0, 1, 0, 24, 0, 0, 0, 0, 0, 8, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
		255, 0, 0, 0, 0, 255, 0, 0} // pixels stored B,G,R: blue, red; row padded to 4 bytes
	src, err = Decode(bmp, "two.bmp")
	if err != nil {
		t.Fatal(err)
	}
	rgb := ToRGB(src.Image)
	if rgb.At(0, 0) != [3]float32{0, 0, 1} || rgb.At(1, 0) != [3]float32{1, 0, 0} {
		t.Errorf("bmp pixels %v %v", rgb.At(0, 0), rgb.At(1, 0))
	}
	if _, err := Decode([]byte("not an image"), "junk.png"); err == nil || !bytes.Contains([]byte(err.Error()), []byte("junk.png")) {
		t.Errorf("error does not name the file: %v", err)
	}
}

// exifAPP1 builds an APP1 segment holding a TIFF-structured IFD0 with one
// Orientation entry: tag 0x0112, type SHORT (3), count 1, the value
// left-justified in the 4-byte value field (TIFF 6.0 §2 "Image File
// Directory", EXIF 2.3 §4.6.2 and Table 4).
func exifAPP1(o uint16, bo binary.AppendByteOrder) []byte {
	var t []byte
	if bo.String() == binary.BigEndian.String() {
		t = append(t, 'M', 'M')
	} else {
		t = append(t, 'I', 'I')
	}
	t = bo.AppendUint16(t, 42)
	t = bo.AppendUint32(t, 8) // IFD0 follows the header
	t = bo.AppendUint16(t, 2) // two entries: an unrelated one first
	t = bo.AppendUint16(t, 0x010F)
	t = bo.AppendUint16(t, 2) // ASCII "Ab\0" fits in the value field
	t = bo.AppendUint32(t, 3)
	t = append(t, 'A', 'b', 0, 0)
	t = bo.AppendUint16(t, 0x0112)
	t = bo.AppendUint16(t, 3)
	t = bo.AppendUint32(t, 1)
	t = bo.AppendUint16(t, o)
	t = bo.AppendUint16(t, 0)
	t = bo.AppendUint32(t, 0) // no next IFD
	payload := append([]byte("Exif\x00\x00"), t...)
	seg := []byte{0xFF, 0xE1}
	seg = binary.BigEndian.AppendUint16(seg, uint16(len(payload)+2))
	return append(seg, payload...)
}

// EXIF orientation (TIFF 6.0 p.36 "Orientation"; EXIF 2.3 §4.6.4 A): the
// tag says which visual side the stored 0th row and 0th column are on. A
// stored picture with distinct colours in three corners is written as a
// JPEG carrying each orientation; after decoding, each corner colour must be
// at the visual corner the definition puts it.
func TestEXIFOrientation(t *testing.T) {
	// value → (side of the 0th row, side of the 0th column), from the spec's table.
	spec := map[uint16][2]string{
		1: {"top", "left"}, 2: {"top", "right"}, 3: {"bottom", "right"}, 4: {"bottom", "left"},
		5: {"left", "top"}, 6: {"right", "top"}, 7: {"right", "bottom"}, 8: {"left", "bottom"},
	}
	opposite := map[string]string{"top": "bottom", "bottom": "top", "left": "right", "right": "left"}
	const sw, sh = 48, 24
	stored := image.NewRGBA(image.Rect(0, 0, sw, sh))
	fill := func(x0, y0 int, c color.RGBA) {
		for y := y0; y < y0+8; y++ {
			for x := x0; x < x0+8; x++ {
				stored.Set(x, y, c)
			}
		}
	}
	for i := 0; i < len(stored.Pix); i += 4 {
		stored.Pix[i+3] = 255 // opaque black background
	}
	red, green, blue := color.RGBA{255, 0, 0, 255}, color.RGBA{0, 255, 0, 255}, color.RGBA{0, 0, 255, 255}
	fill(0, 0, red)      // stored row 0, column 0
	fill(sw-8, 0, green) // row 0, last column
	fill(0, sh-8, blue)  // last row, column 0
	var base bytes.Buffer
	if err := jpeg.Encode(&base, stored, &jpeg.Options{Quality: 100}); err != nil {
		t.Fatal(err)
	}
	for o := uint16(1); o <= 8; o++ {
		for _, bo := range []binary.AppendByteOrder{binary.BigEndian, binary.LittleEndian} {
			file := append([]byte{0xFF, 0xD8}, exifAPP1(o, bo)...)
			file = append(file, base.Bytes()[2:]...)
			src, err := Decode(file, "o.jpg")
			if err != nil {
				t.Fatalf("orientation %d: %v", o, err)
			}
			if int(src.Orientation) != int(o) {
				t.Errorf("orientation read %d, want %d", src.Orientation, o)
			}
			rowSide, colSide := spec[o][0], spec[o][1]
			dw, dh := sw, sh
			if rowSide == "left" || rowSide == "right" {
				dw, dh = sh, sw
			}
			b := src.Image.Bounds()
			if b.Dx() != dw || b.Dy() != dh {
				t.Fatalf("orientation %d: size %v, want %dx%d", o, b.Size(), dw, dh)
			}
			corner := func(a, c string) (int, int) { // visual corner where sides a and c meet, 3 px inside
				x, y := -1, -1
				for _, s := range []string{a, c} {
					switch s {
					case "left":
						x = 3
					case "right":
						x = dw - 4
					case "top":
						y = 3
					case "bottom":
						y = dh - 4
					}
				}
				return x, y
			}
			rgb := ToRGB(src.Image)
			for _, k := range []struct {
				name     string
				row, col string
				want     [3]float32
			}{
				{"red", rowSide, colSide, [3]float32{1, 0, 0}},
				{"green", rowSide, opposite[colSide], [3]float32{0, 1, 0}},
				{"blue", opposite[rowSide], colSide, [3]float32{0, 0, 1}},
			} {
				x, y := corner(k.row, k.col)
				got := rgb.At(x, y)
				for i := range got {
					if math.Abs(float64(got[i]-k.want[i])) > 0.2 {
						t.Errorf("orientation %d (%v): %s corner at (%d,%d) is %v", o, bo, k.name, x, y, got)
						break
					}
				}
			}
		}
	}
	// A bad Orientation value is reported, naming the file.
	bad := append([]byte{0xFF, 0xD8}, exifAPP1(9, binary.BigEndian)...)
	bad = append(bad, base.Bytes()[2:]...)
	if _, err := Decode(bad, "bad.jpg"); err == nil {
		t.Error("orientation 9 accepted")
	}
}
