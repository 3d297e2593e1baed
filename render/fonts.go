package render

import (
	"github.com/golang/freetype/truetype"
	"golang.org/x/image/font"
	"golang.org/x/image/font/gofont/gobold"
	"golang.org/x/image/font/gofont/goregular"
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
	return truetype.NewFace(f, &truetype.Options{Size: px, DPI: 72, Hinting: font.HintingFull})
}
