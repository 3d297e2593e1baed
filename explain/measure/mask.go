package measure

import (
	"fmt"
	"image"
	"image/color"
)

// MaskFromImage reads a decoded mask picture (normally PNG) as booleans,
// row-major over its bounds, by the rule users are told: for grey pictures
// a pixel is lesion when it is at least half of full scale (≥ 128 of 255,
// so anti-aliased 0/255 edges split at the middle); for palette and colour
// pictures when its palette index or any colour channel is non-zero (a 0/1
// label mask stored as a palette or RGB image). name labels errors.
//
// A grey mask whose brightest pixel is non-zero but below half scale is an
// error rather than an empty lesion: it is almost always a 0/1 label mask
// saved as 8-bit grey, and reading it as "no lesion" would make every
// lesion measure undefined without saying why.
func MaskFromImage(img image.Image, name string) (mask []bool, w, h int, err error) {
	b := img.Bounds()
	w, h = b.Dx(), b.Dy()
	if w <= 0 || h <= 0 {
		return nil, 0, 0, fmt.Errorf("mask %s: empty picture", name)
	}
	mask = make([]bool, w*h)
	switch m := img.(type) {
	case *image.Paletted:
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				mask[y*w+x] = m.ColorIndexAt(b.Min.X+x, b.Min.Y+y) != 0
			}
		}
	case *image.Gray, *image.Gray16:
		var top uint32
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				g := color.Gray16Model.Convert(img.At(b.Min.X+x, b.Min.Y+y)).(color.Gray16).Y
				top = max(top, uint32(g))
				mask[y*w+x] = g >= 0x8000
			}
		}
		if top > 0 && top < 0x8000 {
			return nil, 0, 0, fmt.Errorf("mask %s: grey values reach only %d of 255, below the lesion threshold 128; store a 0/1 label mask as 0/255 grey or as a palette PNG", name, top>>8)
		}
	default:
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				r, g, bl, _ := img.At(b.Min.X+x, b.Min.Y+y).RGBA()
				mask[y*w+x] = r|g|bl != 0
			}
		}
	}
	return mask, w, h, nil
}

// FitMask checks that a w×h mask matches the W×H image it belongs to. A
// mismatch is an error naming both sizes unless resize is set; then the
// mask is resampled by nearest neighbour (each target pixel takes the mask
// value under its centre), which keeps it binary and never invents lesion
// between two regions.
func FitMask(mask []bool, w, h, W, H int, resize bool, name string) ([]bool, error) {
	if len(mask) != w*h || w <= 0 || h <= 0 || W <= 0 || H <= 0 {
		return nil, fmt.Errorf("mask %s: %d values for %d×%d (image %d×%d)", name, len(mask), w, h, W, H)
	}
	if w == W && h == H {
		return mask, nil
	}
	if !resize {
		return nil, fmt.Errorf("mask %s is %d×%d but its image is %d×%d; fix the mask or allow resizing masks explicitly", name, w, h, W, H)
	}
	out := make([]bool, W*H)
	for y := 0; y < H; y++ {
		sy := min((2*y+1)*h/(2*H), h-1)
		for x := 0; x < W; x++ {
			sx := min((2*x+1)*w/(2*W), w-1)
			out[y*W+x] = mask[sy*w+sx]
		}
	}
	return out, nil
}
