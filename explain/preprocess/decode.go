// Package preprocess turns image files into model inputs and remembers the
// geometry so that model-space maps and masks can be carried back and forth
// between the model input and the original picture.
//
// Colour rule. Every decoded image, whatever its colour model, becomes RGB
// floats in [0,1] through Go's color.Color.RGBA (16-bit, alpha-premultiplied):
//
//	rgb = (premultiplied + (0xFFFF − alpha)) / 0xFFFF
//
// i.e. alpha is composited over white, and an 8-bit sample v becomes exactly
// v/255 (Go widens 8-bit samples by ×0x101), a 16-bit sample v/65535, so 8-
// and 16-bit files land on the same scale. Gray becomes R=G=B; paletted
// images use their palette entry; YCbCr uses the JFIF full-range BT.601
// matrix of image/color; CMYK uses image/color's naive rule
// R = (1−C)(1−K), G = (1−M)(1−K), B = (1−Y)(1−K) with no ICC profile (Adobe
// inverted CMYK JPEGs are un-inverted by image/jpeg). No colour management
// or gamma conversion is done: values stay in the file's (assumed sRGB)
// encoding, as the training pipelines of typical classifiers read them.
//
// Why white: transparent areas in clinical photos are usually cut-outs meant
// to be shown on a white page. Compositing over black would paint a dark
// border into the input, and dark corners are themselves a known confounder
// of skin-lesion classifiers, so black would manufacture the very artefact
// heedmap looks for.
package preprocess

import (
	"bytes"
	"fmt"
	"image"
	"image/color"
	_ "image/jpeg" // register JPEG
	_ "image/png"  // register PNG
	"os"

	_ "golang.org/x/image/bmp"  // register BMP
	_ "golang.org/x/image/tiff" // register TIFF
)

// Source is a decoded picture, upright: EXIF orientation (JPEG APP1, and the
// Orientation tag of TIFF files) has already been applied.
type Source struct {
	Name        string      // file name, for messages
	Format      string      // "png", "jpeg", "tiff", "bmp"
	Orientation Orientation // as stored in the file; 0 when absent
	Image       image.Image // upright; Bounds().Min may be non-zero
}

// Load reads and decodes an image file.
func Load(path string) (*Source, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("preprocess: %w", err)
	}
	return Decode(b, path)
}

// Decode decodes the bytes of an image file; name is used in errors.
func Decode(b []byte, name string) (*Source, error) {
	img, format, err := image.Decode(bytes.NewReader(b))
	if err != nil {
		return nil, fmt.Errorf("preprocess: %s: cannot decode image: %w", name, err)
	}
	if r := img.Bounds(); r.Empty() {
		return nil, fmt.Errorf("preprocess: %s: image has no pixels", name)
	}
	var o Orientation
	switch format {
	case "jpeg":
		o, err = jpegOrientation(b)
	case "tiff":
		o, err = tiffOrientation(b)
	}
	if err != nil {
		return nil, fmt.Errorf("preprocess: %s: %w", name, err)
	}
	return &Source{Name: name, Format: format, Orientation: o, Image: orient(img, o)}, nil
}

// orient returns img turned upright for orientation o (a copy as RGBA64,
// which keeps 16-bit samples and alpha exactly).
func orient(img image.Image, o Orientation) image.Image {
	if o <= 1 || o > 8 {
		return img
	}
	r := img.Bounds()
	sw, sh := r.Dx(), r.Dy()
	dw, dh := sw, sh
	if o.swapsAxes() {
		dw, dh = sh, sw
	}
	dst := image.NewRGBA64(image.Rect(0, 0, dw, dh))
	for sy := 0; sy < sh; sy++ {
		for sx := 0; sx < sw; sx++ {
			dx, dy := o.displayed(sx, sy, sw, sh)
			dst.Set(dx, dy, img.At(r.Min.X+sx, r.Min.Y+sy))
		}
	}
	return dst
}

// RGB is an image as interleaved R,G,B floats in [0,1], row-major.
type RGB struct {
	W, H int
	Pix  []float32 // len 3·W·H
}

// At returns the colour of pixel (x, y).
func (m *RGB) At(x, y int) [3]float32 {
	i := 3 * (y*m.W + x)
	return [3]float32{m.Pix[i], m.Pix[i+1], m.Pix[i+2]}
}

// ToRGB converts any image by the package's colour rule (see the package
// comment).
func ToRGB(img image.Image) *RGB {
	r := img.Bounds()
	out := &RGB{W: r.Dx(), H: r.Dy(), Pix: make([]float32, 3*r.Dx()*r.Dy())}
	i := 0
	for y := r.Min.Y; y < r.Max.Y; y++ {
		for x := r.Min.X; x < r.Max.X; x++ {
			c := ColorToRGB(img.At(x, y))
			out.Pix[i], out.Pix[i+1], out.Pix[i+2] = c[0], c[1], c[2]
			i += 3
		}
	}
	return out
}

// ColorToRGB applies the colour rule to one colour.
func ColorToRGB(c color.Color) [3]float32 {
	r, g, b, a := c.RGBA()
	w := 0xFFFF - a // white's contribution where the pixel is transparent
	return [3]float32{
		float32(r+w) / 0xFFFF,
		float32(g+w) / 0xFFFF,
		float32(b+w) / 0xFFFF,
	}
}
