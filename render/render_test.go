package render

import (
	"bytes"
	"flag"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/fogleman/gg"

	"heedmap/render/colour"
)

var update = flag.Bool("update", false, "rewrite the example renders in testdata/")

func uniform(w, h int, c color.RGBA) *image.RGBA {
	img := image.NewRGBA(image.Rect(0, 0, w, h))
	for i := 0; i < w*h; i++ {
		copy(img.Pix[4*i:], []uint8{c.R, c.G, c.B, c.A})
	}
	return img
}

func rgbaAt(img *image.RGBA, x, y int) color.RGBA { return img.RGBAAt(x, y) }

// plan reproduces the layout Overlay used, for geometry checks.
func plan(t *testing.T, s Scene) overlayLayout {
	t.Helper()
	b, err := newBase(s.Image, s.Lesion, s.Artefacts)
	if err != nil {
		t.Fatal(err)
	}
	ht, err := newHeat(&s.Map, b.w, b.h)
	if err != nil {
		t.Fatal(err)
	}
	fs := overlayFaces{face(false, overlayTextPx), face(true, overlayTitlePx)}
	defer fs.Close()
	return planOverlay(b, ht, s.Caption, fs)
}

func TestOverlaySizes(t *testing.T) {
	for _, c := range []struct{ w, h, wantPicW, wantPicH int }{
		{224, 224, 896, 896}, // ×4: integer enlargement to ≥ 800 px
		{64, 48, 832, 624},   // ×13
		{1000, 600, 1000, 600},
		{3200, 1600, 1600, 800}, // reduced to 1600 px on the long side
	} {
		s := Scene{Image: uniform(c.w, c.h, color.RGBA{90, 90, 90, 255}), Map: Attribution{Values: make([]float32, c.w*c.h)}}
		img, err := Overlay(s)
		if err != nil {
			t.Fatal(err)
		}
		L := plan(t, s)
		if L.picture.Dx() != c.wantPicW || L.picture.Dy() != c.wantPicH {
			t.Errorf("%d×%d: picture %v, want %d×%d", c.w, c.h, L.picture, c.wantPicW, c.wantPicH)
		}
		if img.Bounds() != L.canvas || img.Bounds().Dx() < 800+overlayRightW {
			t.Errorf("%d×%d: canvas %v (layout %v)", c.w, c.h, img.Bounds(), L.canvas)
		}
	}
}

func TestOverlayRejectsBadInput(t *testing.T) {
	img := uniform(10, 10, color.RGBA{0, 0, 0, 255})
	good := make([]float32, 100)
	nan := make([]float32, 100)
	nan[5] = float32(math.NaN())
	for name, s := range map[string]Scene{
		"nil image":      {Map: Attribution{Values: good}},
		"short values":   {Image: img, Map: Attribution{Values: good[:99]}},
		"short seen":     {Image: img, Map: Attribution{Values: good, Seen: make([]bool, 3)}},
		"short lesion":   {Image: img, Map: Attribution{Values: good}, Lesion: make([]bool, 7)},
		"short artefact": {Image: img, Map: Attribution{Values: good}, Artefacts: map[string][]bool{"hair": nil}},
		"NaN seen value": {Image: img, Map: Attribution{Values: nan}},
		"negative scale": {Image: img, Map: Attribution{Values: good, Scale: -1}},
		"box outside":    {Image: img, Map: Attribution{Values: good, HotRegions: []image.Rectangle{image.Rect(20, 20, 30, 30)}}},
	} {
		if _, err := Overlay(s); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
	// NaN where the model saw nothing is fine: it is not drawn.
	seen := make([]bool, 100)
	for i := range seen {
		seen[i] = i != 5
	}
	if _, err := Overlay(Scene{Image: img, Map: Attribution{Values: nan, Seen: seen}}); err != nil {
		t.Errorf("NaN on an unseen pixel: %v", err)
	}
}

// boundaryNear marks canvas pixels within r of the lesion boundary, the
// boundary taken straight from the mask (edges between 4-neighbours that
// differ, image border counting as outside) and scaled to the picture.
func boundaryNear(mask []bool, w, h int, pic image.Rectangle, r float64) (near []bool, mids []image.Point) {
	at := func(x, y int) bool { return x >= 0 && y >= 0 && x < w && y < h && mask[y*w+x] }
	sx := float64(pic.Dx()) / float64(w)
	sy := float64(pic.Dy()) / float64(h)
	cw, ch := pic.Max.X+100, pic.Max.Y+100
	near = make([]bool, cw*ch)
	seg := func(x0, y0, x1, y1 float64) {
		mids = append(mids, image.Pt(int((x0+x1)/2), int((y0+y1)/2)))
		for y := int(math.Min(y0, y1) - r - 1); y <= int(math.Max(y0, y1)+r+1); y++ {
			for x := int(math.Min(x0, x1) - r - 1); x <= int(math.Max(x0, x1)+r+1); x++ {
				if x < 0 || y < 0 || x >= cw || y >= ch {
					continue
				}
				px, py := float64(x)+0.5, float64(y)+0.5 // pixel centre
				cx := math.Max(math.Min(px, math.Max(x0, x1)), math.Min(x0, x1))
				cy := math.Max(math.Min(py, math.Max(y0, y1)), math.Min(y0, y1))
				if math.Hypot(px-cx, py-cy) <= r {
					near[y*cw+x] = true
				}
			}
		}
	}
	ox, oy := float64(pic.Min.X), float64(pic.Min.Y)
	for y := -1; y <= h; y++ {
		for x := -1; x <= w; x++ {
			if at(x, y) != at(x+1, y) { // vertical edge at x+1
				seg(ox+float64(x+1)*sx, oy+float64(y)*sy, ox+float64(x+1)*sx, oy+float64(y+1)*sy)
			}
			if at(x, y) != at(x, y+1) { // horizontal edge at y+1
				seg(ox+float64(x)*sx, oy+float64(y+1)*sy, ox+float64(x+1)*sx, oy+float64(y+1)*sy)
			}
		}
	}
	return near, mids
}

// The lesion outline's white core lies on the mask boundary and covers all
// of it; away from the outline a zero map leaves the photograph untouched.
func TestLesionOutlineOnMaskBoundary(t *testing.T) {
	w, h := 60, 45
	mask := make([]bool, w*h)
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			in := x >= 8 && x < 25 && y >= 10 && y < 30             // rectangle
			in = in || math.Hypot(float64(x)-42, float64(y)-22) < 9 // disc
			mask[y*w+x] = in
		}
	}
	grey := color.RGBA{60, 60, 60, 255}
	s := Scene{Image: uniform(w, h, grey), Map: Attribution{Values: make([]float32, w*h)}, Lesion: mask}
	img, err := Overlay(s)
	if err != nil {
		t.Fatal(err)
	}
	L := plan(t, s)
	st := lesionStyle(lineScale(L.picture))
	onCore, mids := boundaryNear(mask, w, h, L.picture, st.coreW/2+1.5)
	nearHalo, _ := boundaryNear(mask, w, h, L.picture, st.haloW/2+1.5)
	cw := L.picture.Max.X + 100
	white := func(c color.RGBA) bool { return c.R >= 240 && c.G >= 240 && c.B >= 240 }
	stray, changed := 0, 0
	for y := L.picture.Min.Y; y < L.picture.Max.Y; y++ {
		for x := L.picture.Min.X; x < L.picture.Max.X; x++ {
			c := rgbaAt(img, x, y)
			if white(c) && !onCore[y*cw+x] {
				stray++
			}
			if !nearHalo[y*cw+x] && c != grey {
				changed++
			}
		}
	}
	if stray > 0 {
		t.Errorf("%d white outline pixels lie off the mask boundary", stray)
	}
	if changed > 0 {
		t.Errorf("%d pixels away from the outline differ from the photograph under a zero map", changed)
	}
	missed := 0
	for _, m := range mids {
		found := false
		for dy := -2; dy <= 2 && !found; dy++ {
			for dx := -2; dx <= 2 && !found; dx++ {
				found = white(rgbaAt(img, m.X+dx, m.Y+dy))
			}
		}
		if !found {
			missed++
		}
	}
	if missed > 0 {
		t.Errorf("%d of %d boundary edges have no white outline pixel within 2 px", missed, len(mids))
	}
}

// Unseen pixels show the hatch pattern whatever their value: the same with
// a huge attribution as with zero, hatch lines in the ink colour, the rest
// greyed well away from the (saturated red) photograph.
func TestUnseenIsHatchedNotZero(t *testing.T) {
	w, h := 50, 40
	red := color.RGBA{210, 30, 30, 255}
	seen := make([]bool, w*h)
	hot := make([]float32, w*h)
	cold := make([]float32, w*h)
	for i := range seen {
		seen[i] = i%w >= 20
		hot[i] = 5 // strong everywhere, also where unseen
		if seen[i] {
			cold[i] = 5
		}
	}
	mk := func(v []float32) (*image.RGBA, overlayLayout) {
		s := Scene{Image: uniform(w, h, red), Map: Attribution{Values: v, Seen: seen}}
		img, err := Overlay(s)
		if err != nil {
			t.Fatal(err)
		}
		return img, plan(t, s)
	}
	a, L := mk(hot)
	b, _ := mk(cold)
	scale := float64(L.picture.Dx()) / float64(w)
	lines, other := 0, 0
	for y := L.picture.Min.Y; y < L.picture.Max.Y; y++ {
		for x := L.picture.Min.X; x < L.picture.Min.X+int(20*scale); x++ {
			ca, cb := rgbaAt(a, x, y), rgbaAt(b, x, y)
			if ca != cb {
				t.Fatalf("unseen pixel (%d, %d) depends on the value: %v vs %v", x, y, ca, cb)
			}
			if hatch(x-L.picture.Min.X, y-L.picture.Min.Y, hatchPeriod, hatchWidth) {
				lines++
				if ca != unseenInk {
					t.Fatalf("hatch line pixel (%d, %d) is %v, want %v", x, y, ca, unseenInk)
				}
				continue
			}
			other++
			spread := int(max(ca.R, ca.G, ca.B)) - int(min(ca.R, ca.G, ca.B))
			if spread > 60 || ca == red {
				t.Fatalf("unseen pixel (%d, %d) = %v is not greyed (photo %v)", x, y, ca, red)
			}
		}
	}
	if f := float64(lines) / float64(lines+other); math.Abs(f-float64(hatchWidth)/hatchPeriod) > 0.02 {
		t.Errorf("hatch covers %.3f of the unseen area, want %.3f", f, float64(hatchWidth)/hatchPeriod)
	}
	// A seen pixel at full magnitude carries the ramp's end colour.
	c := rgbaAt(a, L.picture.Max.X-3, L.picture.Max.Y-3)
	end := colour.Sequential().Entry(255)
	if dist(c, end) >= dist(red, end) {
		t.Errorf("seen pixel at the maximum %v is not pulled towards the ramp end %v", c, end)
	}
}

func dist(a color.RGBA, b color.NRGBA) float64 {
	return math.Abs(float64(a.R)-float64(b.R)) + math.Abs(float64(a.G)-float64(b.G)) + math.Abs(float64(a.B)-float64(b.B))
}

// Opacity grows with magnitude: a zero value leaves the photo, larger
// values move further from it, for both signs on a signed map.
func TestHeatOpacityGrowsWithMagnitude(t *testing.T) {
	w, h := 9, 1
	grey := color.RGBA{128, 128, 128, 255}
	v := []float32{0, 0.25, 0.5, 0.75, 1, -0.25, -0.5, -0.75, -1}
	s := Scene{Image: uniform(w, h, grey), Map: Attribution{Values: v, Signed: true}}
	img, err := Overlay(s)
	if err != nil {
		t.Fatal(err)
	}
	L := plan(t, s)
	sc := L.picture.Dx() / w
	px := func(i int) color.RGBA {
		return rgbaAt(img, L.picture.Min.X+i*sc+sc/2, L.picture.Min.Y+L.picture.Dy()/2)
	}
	if px(0) != grey {
		t.Errorf("zero attribution changed the photo: %v", px(0))
	}
	d := func(c color.RGBA) float64 {
		return math.Abs(float64(c.R)-128) + math.Abs(float64(c.G)-128) + math.Abs(float64(c.B)-128)
	}
	for i := 1; i < 4; i++ {
		if !(d(px(i+1)) > d(px(i))) || !(d(px(i+5)) > d(px(i+4))) {
			t.Errorf("opacity not increasing with |value| at step %d", i)
		}
	}
	if !(px(4).R > px(4).B) || !(px(8).B > px(8).R) {
		t.Errorf("positive end %v should be red-ish and negative end %v blue-ish", px(4), px(8))
	}
}

// The colour bar's top row is the ramp's last entry and its bottom row the
// first, for both ramps; a signed bar's middle is the light neutral centre.
func TestColourBarEnds(t *testing.T) {
	w, h := 30, 30
	for _, signed := range []bool{false, true} {
		v := make([]float32, w*h)
		v[7] = 1
		s := Scene{Image: uniform(w, h, color.RGBA{0, 0, 0, 255}), Map: Attribution{Values: v, Signed: signed}}
		img, err := Overlay(s)
		if err != nil {
			t.Fatal(err)
		}
		L := plan(t, s)
		ramp := colour.Sequential()
		if signed {
			ramp = colour.Diverging()
		}
		lut := ramp.LUT()
		for x := L.bar.Min.X; x < L.bar.Max.X; x++ {
			top, bot := rgbaAt(img, x, L.bar.Min.Y), rgbaAt(img, x, L.bar.Max.Y-1)
			if top != (color.RGBA{lut[255].R, lut[255].G, lut[255].B, 255}) || bot != (color.RGBA{lut[0].R, lut[0].G, lut[0].B, 255}) {
				t.Fatalf("signed=%v: bar ends %v / %v, ramp ends %v / %v", signed, top, bot, lut[255], lut[0])
			}
		}
		if signed {
			mid := rgbaAt(img, L.bar.Min.X+2, (L.bar.Min.Y+L.bar.Max.Y-1)/2)
			if mid.R < 230 || mid.G < 230 || mid.B < 230 {
				t.Errorf("signed bar centre %v is not light neutral", mid)
			}
		}
	}
}

// Hot-region boxes are drawn where their rectangles are.
func TestHotRegionBoxes(t *testing.T) {
	w, h := 40, 40
	box := image.Rect(10, 12, 30, 28)
	s := Scene{Image: uniform(w, h, color.RGBA{70, 70, 70, 255}),
		Map: Attribution{Values: make([]float32, w*h), HotRegions: []image.Rectangle{box}}}
	img, err := Overlay(s)
	if err != nil {
		t.Fatal(err)
	}
	L := plan(t, s)
	sc := float64(L.picture.Dx()) / float64(w)
	X := func(v int) int { return L.picture.Min.X + int(math.Round(float64(v)*sc)) }
	Y := func(v int) int { return L.picture.Min.Y + int(math.Round(float64(v)*sc)) }
	for _, p := range []image.Point{
		{(X(box.Min.X) + X(box.Max.X)) / 2, Y(box.Max.Y)}, // bottom side
		{X(box.Min.X), (Y(box.Min.Y) + Y(box.Max.Y)) / 2}, // left side
		{X(box.Max.X), (Y(box.Min.Y) + Y(box.Max.Y)) / 2}, // right side
	} {
		found := false
		for d := -1; d <= 1 && !found; d++ {
			found = rgbaAt(img, p.X+d, p.Y) == boxColour || rgbaAt(img, p.X, p.Y+d) == boxColour
		}
		if !found {
			t.Errorf("no box colour at %v", p)
		}
	}
	// Nothing cyan in the middle of the box.
	if c := rgbaAt(img, X(20), Y(20)); c == boxColour {
		t.Error("box interior is filled")
	}
}

// testPanelLayout plans a panel for c as Panel does, with the legend and
// footer at their usual one-line heights.
func testPanelLayout(t *testing.T, c Case) panelLayout {
	t.Helper()
	dc := gg.NewContext(10, 10)
	head, text, value := face(true, panelHeadPx), face(false, panelTextPx), face(true, panelValuePx)
	defer head.Close()
	defer text.Close()
	defer value.Close()
	scales := make([]string, len(c.Methods))
	for i := range scales {
		scales[i] = "max 0.123"
	}
	w, h := c.Image.Bounds().Dx(), c.Image.Bounds().Dy()
	return planPanel(dc, c.Methods, scales, panelLegendMin, 54, w, h, head, text, value)
}

func TestPanelLayout(t *testing.T) {
	for _, size := range [][2]int{{120, 90}, {224, 224}} {
		s := newSynth(size[0], size[1])
		for n := 1; n <= MaxPanelMethods; n++ {
			c := s.panel(n)
			img, err := Panel(c)
			if err != nil {
				t.Fatalf("%d methods: %v", n, err)
			}
			if img.Bounds() != image.Rect(0, 0, 1920, 1080) {
				t.Fatalf("%d methods: size %v", n, img.Bounds())
			}
			L := testPanelLayout(t, c)
			main := image.Rect(panelPad, L.mainTop, panelW-panelPad, L.legendY)
			p := L.tiles
			rects := []image.Rectangle{L.refs[0], L.refs[1]}
			for i := 0; i < n; i++ {
				rects = append(rects, L.method(i))
			}
			for i, r := range rects {
				if !r.In(main) {
					t.Errorf("%v, %d methods: rectangle %d %v outside %v", size, n, i, r, main)
				}
				for j, q := range rects[:i] {
					if r.Overlaps(q) {
						t.Errorf("%v, %d methods: rectangles %d %v and %d %v overlap", size, n, i, r, j, q)
					}
				}
			}
			// Pictures stay projector-sized even with seven methods: at
			// least 320 px on the short side (they were ~200 px before the
			// grid spanned the slide's width).
			if min(p.picW, p.picH) < 320 {
				t.Errorf("%v, %d methods: pictures only %d×%d px", size, n, p.picW, p.picH)
			}
			if n == MaxPanelMethods {
				t.Logf("%v, 7 methods: pictures %d×%d px, %d×%d grid, compact=%v full labels=%v, reference column %d px",
					size, p.picW, p.picH, p.rows, p.cols, p.compact, p.fullLabels, L.refW)
				if L.first == 1 && (!L.refs[0].In(p.tileRect(0)) || !L.refs[1].In(p.tileRect(0)) || L.refs[0].Overlaps(L.refs[1])) {
					t.Errorf("%v: original %v and mask %v do not share grid cell 0 %v", size, L.refs[0], L.refs[1], p.tileRect(0))
				}
			}
		}
	}
	s := newSynth(120, 90)
	for _, n := range []int{0, MaxPanelMethods + 1} {
		if _, err := Panel(s.panel(n)); err == nil {
			t.Errorf("%d methods: no error", n)
		}
	}
	// The caution fits the footer in at most two lines at ≥ 22 px.
	if panelTextPx < 22 {
		t.Errorf("panel text %d px is below 22 px", panelTextPx)
	}
}

func TestWritePNG(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "a.png")
	img := uniform(7, 5, color.RGBA{1, 2, 3, 255})
	img.SetRGBA(3, 2, color.RGBA{200, 100, 50, 255})
	for round := 0; round < 2; round++ { // second round replaces the file
		if err := WritePNG(path, img); err != nil {
			t.Fatal(err)
		}
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	got, err := png.Decode(f)
	if err != nil {
		t.Fatal(err)
	}
	if r, g, b, _ := got.At(3, 2).RGBA(); r>>8 != 200 || g>>8 != 100 || b>>8 != 50 || got.Bounds() != img.Bounds() {
		t.Errorf("round trip: %v at (3,2), bounds %v", got.At(3, 2), got.Bounds())
	}
	ents, _ := os.ReadDir(dir)
	if len(ents) != 1 {
		t.Errorf("directory holds %d entries, want only a.png (temporary file left behind?)", len(ents))
	}
	if err := WritePNG(filepath.Join(dir, "missing", "b.png"), img); err == nil {
		t.Error("no error for a missing directory")
	}
}

// TestExamples writes the example renders under testdata/ with -update and
// otherwise checks that the committed ones decode at the expected sizes.
func TestExamples(t *testing.T) {
	s := newSynth(224, 224)
	ex := []struct {
		name string
		make func() (*image.RGBA, error)
	}{
		{"overlay_unsigned.png", func() (*image.RGBA, error) { return Overlay(s.scene(false)) }},
		{"overlay_signed.png", func() (*image.RGBA, error) { return Overlay(s.scene(true)) }},
		{"panel_7_methods.png", func() (*image.RGBA, error) { return Panel(newSynth(120, 90).panel(7)) }},
	}
	for _, e := range ex {
		path := filepath.Join("testdata", e.name)
		if *update {
			img, err := e.make()
			if err != nil {
				t.Fatal(err)
			}
			if err := os.MkdirAll("testdata", 0o755); err != nil {
				t.Fatal(err)
			}
			// Best compression: the examples are committed, and the panel
			// at BestSpeed (WritePNG's trade-off for batch runs) is too big.
			var buf bytes.Buffer
			if err := (&png.Encoder{CompressionLevel: png.BestCompression}).Encode(&buf, img); err != nil {
				t.Fatal(err)
			}
			if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		f, err := os.Open(path)
		if err != nil {
			t.Skipf("%s: %v (run go test -update to make it)", path, err)
		}
		cfg, err := png.DecodeConfig(f)
		f.Close()
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		if fi, _ := os.Stat(path); fi.Size() > 300<<10 {
			t.Errorf("%s is %d KB, keep examples under 300 KB", path, fi.Size()>>10)
		}
		if strings.HasPrefix(e.name, "panel_") && (cfg.Width != 1920 || cfg.Height != 1080) {
			t.Errorf("%s is %d×%d", path, cfg.Width, cfg.Height)
		}
	}
}

// Every method tile shows its colour-scale maximum, whatever the length of
// the method's name: a long name pushes the scale to a line of its own
// instead of hiding it. The test looks for text pixels (well above the
// background's lightness) in the right half of the header strip of each
// tile, where the scale is right-aligned.
func TestPanelShowsEveryScale(t *testing.T) {
	s := newSynth(120, 90)
	for _, names := range [][]string{
		{"occlusion", "gradient", "integrated-gradients", "grad-cam"},
		{"integrated-gradients", "smoothgrad-integrated-gradients-long", "occlusion-sensitivity-16px", "gradient-x-input", "grad-cam", "rise"},
		{"x"},
	} {
		c := s.panel(len(names))
		for i := range c.Methods {
			c.Methods[i].Name = names[i]
		}
		img, err := Panel(c)
		if err != nil {
			t.Fatal(err)
		}
		dc := gg.NewContext(10, 10)
		head, text := face(true, panelHeadPx), face(false, panelTextPx)
		scales := make([]string, len(names))
		for i := range scales {
			scales[i] = "max 1"
		}
		L := testPanelLayout(t, c)
		plan := L.tiles
		for i, name := range names {
			tile := L.method(i)
			// The scale is right-aligned; a strip as wide as its text
			// cannot reach a name that shares the line (20 px gap).
			dc.SetFontFace(text)
			sw, _ := dc.MeasureString(scales[i])
			strip := image.Rect(tile.Max.X-int(sw), tile.Min.Y, tile.Max.X, tile.Min.Y+plan.headH)
			if !headerFits(dc, name, scales[i], float64(tile.Dx()), head, text) {
				// Second line only: the first holds the name.
				strip.Min.Y += tileHeadH
			}
			bright := 0
			for y := strip.Min.Y; y < strip.Max.Y; y++ {
				for x := strip.Min.X; x < strip.Max.X; x++ {
					// Text is light grey; the pictures' skin tones and
					// artefact colours are not grey.
					c := img.RGBAAt(x, y)
					if c.R > 150 && absDiff(c.R, c.G) < 16 && absDiff(c.G, c.B) < 16 {
						bright++
					}
				}
			}
			if bright < 20 {
				t.Errorf("%d methods, %q: no scale text in %v (%d text pixels)", len(names), name, strip, bright)
			}
		}
	}
}

func absDiff(a, b uint8) int {
	if a > b {
		return int(a - b)
	}
	return int(b - a)
}

// "n/a" (not computed) and "none" (computed, no off-lesion hot region) are
// different statements and must read differently.
func TestOffLesionWording(t *testing.T) {
	m := NoMetrics()
	if offLesionText(m) != "n/a" || offLesionShort(m) != "n/a" {
		t.Errorf("not computed: %q %q", offLesionText(m), offLesionShort(m))
	}
	m.OffLesion = 0
	if offLesionText(m) != "none" || offLesionShort(m) != "none" {
		t.Errorf("no region: %q %q", offLesionText(m), offLesionShort(m))
	}
	m.OffLesion, m.OffLesionBox = 0.046, 1
	if got := offLesionShort(m); got != "4.6 % \u00b7 box 1" {
		t.Errorf("region: %q", got)
	}
}

// A category looks the same on every image of a report, whatever other
// categories the image carries, and the seven usual categories plus
// user-named ones never share a look within an image.
func TestArtefactStylesStable(t *testing.T) {
	img := image.NewRGBA(image.Rect(0, 0, 4, 4))
	mk := func(names ...string) map[string]artefactLayer {
		arts := map[string][]bool{}
		for _, n := range names {
			arts[n] = make([]bool, 16)
		}
		b, err := newBase(img, nil, arts)
		if err != nil {
			t.Fatal(err)
		}
		out := map[string]artefactLayer{}
		for _, a := range b.artefacts {
			out[a.name] = a
		}
		return out
	}
	look := func(a artefactLayer) string { return fmt.Sprint(a.ink, a.dash) }
	one := mk("ruler")
	many := mk("bubbles", "dark_corners", "gel border", "hair", "ink", "patches", "ruler", "pen mark", "sticker")
	if look(one["ruler"]) != look(many["ruler"]) {
		t.Errorf("ruler looks different alone (%s) and with others (%s)", look(one["ruler"]), look(many["ruler"]))
	}
	if a, b := mk("sticker", "hair")["sticker"], mk("sticker")["sticker"]; look(a) != look(b) {
		t.Errorf("a user category's look depends on the others: %s vs %s", look(a), look(b))
	}
	seen := map[string]string{}
	for name, a := range many {
		if other, dup := seen[look(a)]; dup {
			t.Errorf("%q and %q share a look %s", name, other, look(a))
		}
		seen[look(a)] = name
	}
}
