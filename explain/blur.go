package explain

import (
	"fmt"
	"math"

	"heedmap/tensor"
)

// Blur returns a Gaussian-blurred copy of an [N, C, H, W] tensor: separable
// kernel exp(−d²/2σ²) truncated at 3σ, weights renormalised where the kernel
// leaves the image, so a uniform image stays uniform (no dark border). σ is
// in pixels; σ ≤ 0 returns a copy. Because the kernel's weights sum to one
// and normalisation is affine per channel, blurring in model-input space
// equals blurring the picture and normalising afterwards.
func Blur(x *tensor.Tensor, sigma float64) (*tensor.Tensor, error) {
	if x == nil || x.DType != tensor.Float32 || len(x.Shape) != 4 {
		return nil, fmt.Errorf("explain: blur wants a float [N, C, H, W] tensor, got %v", x)
	}
	out := x.Clone()
	if sigma <= 0 {
		return out, nil
	}
	r := int(math.Ceil(3 * sigma))
	k := make([]float64, 2*r+1)
	for i := range k {
		d := float64(i - r)
		k[i] = math.Exp(-d * d / (2 * sigma * sigma))
	}
	h, w := x.Shape[2], x.Shape[3]
	planes := x.Shape[0] * x.Shape[1]
	tmp := make([]float64, h*w)
	for p := 0; p < planes; p++ {
		src := x.F32[p*h*w : (p+1)*h*w]
		for y := 0; y < h; y++ {
			for xx := 0; xx < w; xx++ {
				var s, ws float64
				for i := max(0, xx-r); i <= min(w-1, xx+r); i++ {
					s += k[i-xx+r] * float64(src[y*w+i])
					ws += k[i-xx+r]
				}
				tmp[y*w+xx] = s / ws
			}
		}
		dst := out.F32[p*h*w : (p+1)*h*w]
		for y := 0; y < h; y++ {
			for xx := 0; xx < w; xx++ {
				var s, ws float64
				for i := max(0, y-r); i <= min(h-1, y+r); i++ {
					s += k[i-y+r] * tmp[i*w+xx]
					ws += k[i-y+r]
				}
				dst[y*w+xx] = float32(s / ws)
			}
		}
	}
	return out, nil
}
