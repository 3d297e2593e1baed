package main

import (
	"fmt"
	"image"
	"image/color"
	"math"
	"os"

	"heedmap/explain/preprocess"
)

// The memory cap. A worker holds its image several times over at the
// picture's own size (decoded pixels, the map carried back for each overlay,
// masks, the rendered overlay), so the largest picture bounds a worker's
// memory. --max-megapixels caps the pixel count a worker works at, by this
// stated rule:
//
//   - up to the cap: the picture is used as it is;
//   - above the cap, up to maxDecodeFactor times it: the picture is decoded
//     once and at once reduced by the smallest integer factor k ≥ 2 with
//     ⌈W/k⌉·⌈H/k⌉ ≤ cap, each new pixel the plain mean of its k×k block
//     (alpha-premultiplied, blocks cut by the right and bottom edges average
//     the pixels they have: Pillow's Image.reduce rule). Masks, which stay
//     at the original size, follow by nearest neighbour (measure.FitMask).
//     Overlays and panels show the reduced picture; the record's "reduced"
//     column says so;
//   - above maxDecodeFactor times the cap: the image gets an error record
//     without being decoded, since decoding alone would exceed the cap.
//
// Model inputs are far smaller than any cap, so for the default cap the
// reduction changes overlays, not measures, except through the resampling
// of a picture already being shrunk to the model size.
const maxDecodeFactor = 4

// defaultMegapixels is the default cap: 6000×4000 dermoscopy pictures
// (24 MP) pass unchanged.
const defaultMegapixels = 25

// capPixels is the cap in pixels; 0 means no cap.
func capPixels(mp float64) int {
	if mp <= 0 {
		return 0
	}
	return int(math.Round(mp * 1e6))
}

// reduceFactor returns the smallest k ≥ 1 with ⌈w/k⌉·⌈h/k⌉ ≤ limit.
func reduceFactor(w, h, limit int) int {
	if limit <= 0 {
		return 1
	}
	k := 1
	for ((w+k-1)/k)*((h+k-1)/k) > limit {
		k++
	}
	return k
}

// boxReduce returns img reduced k times: pixel (x, y) is the mean of the
// source block [kx, kx+k) × [ky, ky+k) clipped to the picture, computed on
// 16-bit premultiplied RGBA and rounded to nearest.
func boxReduce(img image.Image, k int) *image.RGBA64 {
	b := img.Bounds()
	W, H := (b.Dx()+k-1)/k, (b.Dy()+k-1)/k
	out := image.NewRGBA64(image.Rect(0, 0, W, H))
	at := func(x, y int) color.RGBA64 {
		if m, ok := img.(image.RGBA64Image); ok {
			return m.RGBA64At(x, y)
		}
		r, g, bl, a := img.At(x, y).RGBA()
		return color.RGBA64{uint16(r), uint16(g), uint16(bl), uint16(a)}
	}
	sum := make([][4]uint64, W)
	for oy := 0; oy < H; oy++ {
		clear(sum)
		y0, y1 := b.Min.Y+oy*k, min(b.Min.Y+(oy+1)*k, b.Max.Y)
		for y := y0; y < y1; y++ {
			for x := b.Min.X; x < b.Max.X; x++ {
				c := at(x, y)
				s := &sum[(x-b.Min.X)/k]
				s[0] += uint64(c.R)
				s[1] += uint64(c.G)
				s[2] += uint64(c.B)
				s[3] += uint64(c.A)
			}
		}
		for ox := 0; ox < W; ox++ {
			n := uint64((y1 - y0) * (min((ox+1)*k, b.Dx()) - ox*k))
			s := sum[ox]
			out.SetRGBA64(ox, oy, color.RGBA64{uint16((s[0] + n/2) / n), uint16((s[1] + n/2) / n), uint16((s[2] + n/2) / n), uint16((s[3] + n/2) / n)})
		}
	}
	return out
}

// loadSource decodes an upright picture under the memory cap. It returns
// the picture the worker uses, the upright size of the file (masks are
// checked against it) and, when the picture was reduced, a note saying how.
func (w *attributionWorker) loadSource(path string) (src *preprocess.Source, uw, uh int, note string, err error) {
	limit := capPixels(w.cfg.MaxMegapixels)
	if limit > 0 {
		f, err := os.Open(path)
		if err != nil {
			return nil, 0, 0, "", fmt.Errorf("%s: %w", path, unwrapPath(err))
		}
		c, _, err := image.DecodeConfig(f)
		f.Close()
		if err != nil {
			return nil, 0, 0, "", fmt.Errorf("%s: cannot decode image header: %w", path, err)
		}
		if n := c.Width * c.Height; n > maxDecodeFactor*limit {
			return nil, 0, 0, "", fmt.Errorf("%s: %d×%d pixels (%.1f MP) is more than %d× the memory cap (--max-megapixels %g); reduce the file before the run",
				path, c.Width, c.Height, float64(n)/1e6, maxDecodeFactor, w.cfg.MaxMegapixels)
		}
	}
	src, err = preprocess.Load(path)
	if err != nil {
		return nil, 0, 0, "", err
	}
	b := src.Image.Bounds()
	uw, uh = b.Dx(), b.Dy()
	if k := reduceFactor(uw, uh, limit); k > 1 {
		src.Image = boxReduce(src.Image, k)
		r := src.Image.Bounds()
		note = fmt.Sprintf("%dx%d reduced %dx to %dx%d for the memory cap", uw, uh, k, r.Dx(), r.Dy())
	}
	return src, uw, uh, note, nil
}

func unwrapPath(err error) error {
	if pe, ok := err.(*os.PathError); ok {
		return pe.Err
	}
	return err
}
