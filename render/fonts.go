package render

import (
	"github.com/golang/freetype/truetype"
	"golang.org/x/image/font"
	"golang.org/x/image/font/gofont/gobold"
	"golang.org/x/image/font/gofont/goregular"
	"golang.org/x/image/math/fixed"
)

// The Go fonts are embedded in golang.org/x/image, so rendering needs no
// font files on disk. Parsed fonts are read-only; faces hold a glyph cache
// and are made per render.
var (
	fontRegular = mustFont(goregular.TTF)
	fontBold    = mustFont(gobold.TTF)
)

func mustFont(ttf []byte) *truetype.Font {
	f, err := truetype.Parse(ttf)
	if err != nil {
		panic("render: embedded Go font does not parse: " + err.Error())
	}
	return f
}

// face returns a face whose size is px pixels (72 dpi, so points = pixels).
func face(bold bool, px float64) font.Face {
	f := fontRegular
	if bold {
		f = fontBold
	}
	return &advanceCache{Face: truetype.NewFace(f, &truetype.Options{Size: px, DPI: 72, Hinting: font.HintingFull}), adv: map[rune]advance{}}
}

// advanceCache remembers glyph advances. truetype's face caches rendered
// glyphs but runs the hinter again for every GlyphAdvance, and layout
// measures the same short strings many times while fitting captions and
// tiles: measuring was about 5 % of the demo's per-image CPU time. Like the
// face it wraps, it is for one goroutine.
type advanceCache struct {
	font.Face
	adv map[rune]advance
}

type advance struct {
	a  fixed.Int26_6
	ok bool
}

func (c *advanceCache) GlyphAdvance(r rune) (fixed.Int26_6, bool) {
	if v, hit := c.adv[r]; hit {
		return v.a, v.ok
	}
	a, ok := c.Face.GlyphAdvance(r)
	c.adv[r] = advance{a, ok}
	return a, ok
}
