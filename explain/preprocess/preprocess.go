package preprocess

import (
	"context"
	"fmt"
	"image"
	"math"
	"sync"

	"golang.org/x/image/draw"

	"heedmap/explain"
	"heedmap/tensor"
)

// Preprocessor applies a resolved Config. Resampling uses the bilinear kernel
// of golang.org/x/image/draw, which widens its support when shrinking (an
// area-weighted "tent" filter, the antialiased bilinear resize that PIL and
// torchvision's Resize apply, common practice in classifier training). We
// prefer it to Catmull-Rom because it never overshoots: values stay within
// the input range, so a resized black border stays black instead of ringing
// into the lesion. The filter weights are precomputed once per geometry
// (source size → scaled size) and reused; a Preprocessor is safe for
// concurrent use.
type Preprocessor struct {
	cfg  Config
	norm explain.Normalization
	pad  [3]float32

	mu   sync.Mutex
	keys map[[4]int]draw.Scaler
}

// New returns a Preprocessor for cfg, which must be resolved (Width and
// Height set); see Config.Resolve.
func New(cfg Config) (*Preprocessor, error) {
	if cfg.Resize == "" {
		cfg.Resize = Stretch
	}
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	return &Preprocessor{cfg: cfg, norm: cfg.Normalization(), pad: cfg.padRGB(), keys: map[[4]int]draw.Scaler{}}, nil
}

// Config returns the configuration in force.
func (p *Preprocessor) Config() Config { return p.cfg }

// Normalization returns the model-space colour mapping.
func (p *Preprocessor) Normalization() explain.Normalization { return p.norm }

// Input is one preprocessed picture.
type Input struct {
	// Tensor is the model input [1, 3, H, W] (NCHW, model channel order,
	// normalised).
	Tensor *tensor.Tensor
	// Seen is the picture as the model sees it, before normalisation: 0–1
	// RGB of the model input size (for overlays in model space).
	Seen *RGB
	// Placement maps model-space coordinates back to the picture.
	Placement Placement
}

// Placement is the geometry of one preprocessing: the upright source of
// SrcW×SrcH pixels was resampled to ScaledW×ScaledH and placed with its top
// left corner at (OffX, OffY) of the W×H model input (negative offsets when
// cropped, positive when padded).
//
// Coordinates are continuous with pixel i covering [i, i+1) (its centre at
// i+0.5), the convention of the resampler, so model x = x_src·ScaledW/SrcW
// + OffX exactly.
type Placement struct {
	SrcW, SrcH       int
	W, H             int
	ScaledW, ScaledH int
	OffX, OffY       int
}

// NewPlacement computes the geometry of fitting a srcW×srcH picture to a w×h
// input by mode.
func NewPlacement(srcW, srcH, w, h int, mode ResizeMode) (Placement, error) {
	if srcW <= 0 || srcH <= 0 || w <= 0 || h <= 0 {
		return Placement{}, fmt.Errorf("preprocess: cannot place a %d×%d picture on a %d×%d input", srcW, srcH, w, h)
	}
	p := Placement{SrcW: srcW, SrcH: srcH, W: w, H: h, ScaledW: w, ScaledH: h}
	sx, sy := float64(w)/float64(srcW), float64(h)/float64(srcH)
	switch mode {
	case Stretch, "":
		return p, nil
	case Crop:
		s := math.Max(sx, sy)
		p.ScaledW, p.ScaledH = max(w, int(math.Round(float64(srcW)*s))), max(h, int(math.Round(float64(srcH)*s)))
	case Pad:
		s := math.Min(sx, sy)
		p.ScaledW, p.ScaledH = min(w, max(1, int(math.Round(float64(srcW)*s)))), min(h, max(1, int(math.Round(float64(srcH)*s))))
	default:
		return Placement{}, fmt.Errorf("preprocess: resize %q: want stretch, crop or pad", mode)
	}
	// Centre; for odd differences the extra pixel goes right/bottom, as
	// integer halving does in common centre-crop implementations.
	p.OffX, p.OffY = (w-p.ScaledW)/2, (h-p.ScaledH)/2
	if w-p.ScaledW < 0 {
		p.OffX = -((p.ScaledW - w) / 2)
	}
	if h-p.ScaledH < 0 {
		p.OffY = -((p.ScaledH - h) / 2)
	}
	return p, nil
}

// ToModelPoint maps continuous source coordinates to model coordinates.
func (p Placement) ToModelPoint(x, y float64) (float64, float64) {
	return x*float64(p.ScaledW)/float64(p.SrcW) + float64(p.OffX),
		y*float64(p.ScaledH)/float64(p.SrcH) + float64(p.OffY)
}

// ToSourcePoint maps continuous model coordinates to source coordinates.
func (p Placement) ToSourcePoint(x, y float64) (float64, float64) {
	return (x - float64(p.OffX)) * float64(p.SrcW) / float64(p.ScaledW),
		(y - float64(p.OffY)) * float64(p.SrcH) / float64(p.ScaledH)
}

// ToOriginal places a model-space map on the source picture: values[i] for
// source pixel i (row-major SrcW×SrcH), sampled bilinearly at the pixel's
// centre (clamped at the map's edges). Source pixels whose centre falls
// outside the model input (cropped away) get value 0 and seen false. A map of
// another size than the model input is taken to cover the same extent.
func (p Placement) ToOriginal(m explain.Map) (values []float32, seen []bool) {
	values = make([]float32, p.SrcW*p.SrcH)
	seen = make([]bool, p.SrcW*p.SrcH)
	if m.W <= 0 || m.H <= 0 || len(m.Data) != m.W*m.H {
		return values, seen
	}
	kx, ky := float64(m.W)/float64(p.W), float64(m.H)/float64(p.H)
	for y := 0; y < p.SrcH; y++ {
		_, my := p.ToModelPoint(0, float64(y)+0.5)
		if my < 0 || my >= float64(p.H) {
			continue
		}
		fy := my*ky - 0.5
		for x := 0; x < p.SrcW; x++ {
			mx, _ := p.ToModelPoint(float64(x)+0.5, 0)
			if mx < 0 || mx >= float64(p.W) {
				continue
			}
			i := y*p.SrcW + x
			seen[i] = true
			values[i] = bilinear(m, mx*kx-0.5, fy)
		}
	}
	return values, seen
}

// bilinear samples m at pixel-index coordinates (x, y), clamped to the edge.
func bilinear(m explain.Map, x, y float64) float32 {
	x = math.Min(math.Max(x, 0), float64(m.W-1))
	y = math.Min(math.Max(y, 0), float64(m.H-1))
	x0, y0 := int(x), int(y)
	x1, y1 := min(x0+1, m.W-1), min(y0+1, m.H-1)
	fx, fy := x-float64(x0), y-float64(y0)
	a := float64(m.Data[y0*m.W+x0])*(1-fx) + float64(m.Data[y0*m.W+x1])*fx
	b := float64(m.Data[y1*m.W+x0])*(1-fx) + float64(m.Data[y1*m.W+x1])*fx
	return float32(a*(1-fy) + b*fy)
}

// MaskToModel carries a source-space mask (w×h, row-major, normally the
// source size; another size is taken to cover the same extent) to model space
// by nearest neighbour: model pixel (x, y) takes the mask value under its
// centre, false on padding.
func (p Placement) MaskToModel(mask []bool, w, h int) ([]bool, error) {
	if w <= 0 || h <= 0 || len(mask) != w*h {
		return nil, fmt.Errorf("preprocess: mask has %d values for %d×%d", len(mask), w, h)
	}
	out := make([]bool, p.W*p.H)
	for y := 0; y < p.H; y++ {
		_, sy := p.ToSourcePoint(0, float64(y)+0.5)
		my := int(math.Floor(sy * float64(h) / float64(p.SrcH)))
		if sy < 0 || my >= h {
			continue
		}
		for x := 0; x < p.W; x++ {
			sx, _ := p.ToSourcePoint(float64(x)+0.5, 0)
			mx := int(math.Floor(sx * float64(w) / float64(p.SrcW)))
			if sx < 0 || mx >= w {
				continue
			}
			out[y*p.W+x] = mask[my*w+mx]
		}
	}
	return out, nil
}

// UnseenFraction is the fraction of a source-space mask's true pixels whose
// centres the model never saw (cropped away); 0 for an empty mask.
func (p Placement) UnseenFraction(mask []bool, w, h int) (float64, error) {
	if w <= 0 || h <= 0 || len(mask) != w*h {
		return 0, fmt.Errorf("preprocess: mask has %d values for %d×%d", len(mask), w, h)
	}
	total, out := 0, 0
	for y := 0; y < h; y++ {
		_, my := p.ToModelPoint(0, (float64(y)+0.5)*float64(p.SrcH)/float64(h))
		for x := 0; x < w; x++ {
			if !mask[y*w+x] {
				continue
			}
			total++
			mx, _ := p.ToModelPoint((float64(x)+0.5)*float64(p.SrcW)/float64(w), 0)
			if mx < 0 || mx >= float64(p.W) || my < 0 || my >= float64(p.H) {
				out++
			}
		}
	}
	if total == 0 {
		return 0, nil
	}
	return float64(out) / float64(total), nil
}

// scaler returns the precomputed filter for one geometry.
func (p *Preprocessor) scaler(sw, sh, dw, dh int) draw.Scaler {
	k := [4]int{sw, sh, dw, dh}
	p.mu.Lock()
	defer p.mu.Unlock()
	s, ok := p.keys[k]
	if !ok {
		s = draw.BiLinear.NewScaler(dw, dh, sw, sh)
		p.keys[k] = s
	}
	return s
}

// Apply preprocesses an upright picture.
func (p *Preprocessor) Apply(ctx context.Context, img image.Image) (*Input, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	b := img.Bounds()
	pl, err := NewPlacement(b.Dx(), b.Dy(), p.cfg.Width, p.cfg.Height, p.cfg.Resize)
	if err != nil {
		return nil, err
	}
	W, H := pl.W, pl.H
	// Resample the premultiplied colour; compositing over white is linear in
	// (colour, alpha), so doing it after the resampling gives the same
	// result as doing it before.
	dst := image.NewRGBA64(image.Rect(0, 0, W, H))
	dr := image.Rect(pl.OffX, pl.OffY, pl.OffX+pl.ScaledW, pl.OffY+pl.ScaledH)
	p.scaler(b.Dx(), b.Dy(), pl.ScaledW, pl.ScaledH).Scale(dst, dr, img, b, draw.Src, nil)

	seen := &RGB{W: W, H: H, Pix: make([]float32, 3*W*H)}
	inside := dr.Intersect(dst.Bounds())
	for y := 0; y < H; y++ {
		for x := 0; x < W; x++ {
			i := 3 * (y*W + x)
			if !(image.Point{x, y}).In(inside) {
				seen.Pix[i], seen.Pix[i+1], seen.Pix[i+2] = p.pad[0], p.pad[1], p.pad[2]
				continue
			}
			c := ColorToRGB(dst.RGBA64At(x, y))
			seen.Pix[i], seen.Pix[i+1], seen.Pix[i+2] = c[0], c[1], c[2]
		}
	}
	return &Input{Tensor: p.Tensor(seen), Seen: seen, Placement: pl}, nil
}

// Tensor normalises a model-size 0–1 RGB picture into an NCHW [1,3,H,W]
// model input.
func (p *Preprocessor) Tensor(m *RGB) *tensor.Tensor {
	t := tensor.New(1, 3, m.H, m.W)
	n := m.W * m.H
	for i := 0; i < n; i++ {
		v := p.norm.Pixel([3]float32{m.Pix[3*i], m.Pix[3*i+1], m.Pix[3*i+2]})
		t.F32[i], t.F32[n+i], t.F32[2*n+i] = v[0], v[1], v[2]
	}
	return t
}

// ToNHWC returns an NCHW tensor transposed to NHWC, for models that take
// channels last.
func ToNHWC(t *tensor.Tensor) (*tensor.Tensor, error) {
	if len(t.Shape) != 4 || t.DType != tensor.Float32 {
		return nil, fmt.Errorf("preprocess: ToNHWC wants a 4-D float tensor, got %v", t)
	}
	n, c, h, w := t.Shape[0], t.Shape[1], t.Shape[2], t.Shape[3]
	out := tensor.New(n, h, w, c)
	for b := 0; b < n; b++ {
		for k := 0; k < c; k++ {
			for i := 0; i < h*w; i++ {
				out.F32[(b*h*w+i)*c+k] = t.F32[(b*c+k)*h*w+i]
			}
		}
	}
	return out, nil
}

// Load reads an image file and preprocesses it; the Source (upright picture)
// is returned too, for overlays on the original.
func (p *Preprocessor) Load(ctx context.Context, path string) (*Input, *Source, error) {
	src, err := Load(path)
	if err != nil {
		return nil, nil, err
	}
	in, err := p.Apply(ctx, src.Image)
	if err != nil {
		return nil, nil, fmt.Errorf("preprocess: %s: %w", path, err)
	}
	return in, src, nil
}
