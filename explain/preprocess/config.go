package preprocess

import (
	"fmt"
	"strings"

	"heedmap/explain"
)

// ResizeMode says how a picture of another aspect ratio is fitted to the
// model input.
type ResizeMode string

const (
	// Stretch scales each axis independently to the model size; the aspect
	// ratio is not kept but every pixel is seen.
	Stretch ResizeMode = "stretch"
	// Crop scales the shorter side to the model size (keeping the aspect
	// ratio) and takes the centre; the ends of the longer side are not seen.
	Crop ResizeMode = "crop"
	// Pad scales the longer side to the model size (keeping the aspect
	// ratio) and centres the picture on a canvas of PadColor (letterbox).
	Pad ResizeMode = "pad"
)

// Config is the declared preprocessing of a model. Zero fields take the
// defaults stated beside them; Resolve fills what the model itself decides.
type Config struct {
	// Width and Height of the model input; 0 = take from the model input
	// shape.
	Width  int `yaml:"width,omitempty" json:"width,omitempty"`
	Height int `yaml:"height,omitempty" json:"height,omitempty"`
	// Resize is stretch, crop or pad; default stretch.
	Resize ResizeMode `yaml:"resize,omitempty" json:"resize,omitempty"`
	// PadColor is the 0–1 RGB letterbox colour for Resize = pad. Default:
	// the Mean colour (so padding is zero after normalisation, like a
	// convolution's zero padding), or black when there is no Mean.
	PadColor []float32 `yaml:"pad_color,omitempty" json:"pad_color,omitempty"`
	// Range is the value of a white pixel before Mean/Std: 1 (default) or
	// 255 for models fed raw 0–255 values.
	Range float32 `yaml:"range,omitempty" json:"range,omitempty"`
	// Mean and Std are per model channel on the 0–1 scale (e.g. ImageNet
	// mean 0.485, 0.456, 0.406 and std 0.229, 0.224, 0.225 in RGB order);
	// empty = none. v = (pixel − Mean)/Std.
	Mean []float32 `yaml:"mean,omitempty" json:"mean,omitempty"`
	Std  []float32 `yaml:"std,omitempty" json:"std,omitempty"`
	// Channels is RGB (default) or BGR: the order of the model's channels.
	Channels string `yaml:"channels,omitempty" json:"channels,omitempty"`
	// Layout is NCHW or NHWC; empty = detect from the model input shape (a
	// dimension equal to 3 in position 1 means NCHW, in position 3 NHWC).
	// Inputs built here are always NCHW, the layout explain.Network takes;
	// the runtime adapter transposes for NHWC models.
	Layout string `yaml:"layout,omitempty" json:"layout,omitempty"`
}

// Resolve fills Width, Height and Layout from the model input shape (as the
// model declares it, in its own layout; dynamic dimensions ≤ 0) and checks
// the rest. Explicit settings win over the shape.
func (c Config) Resolve(shape []int) (Config, error) {
	if c.Resize == "" {
		c.Resize = Stretch
	}
	c.Layout = strings.ToUpper(c.Layout)
	if len(shape) == 4 {
		if c.Layout == "" {
			switch {
			case shape[1] == 3 && shape[3] != 3:
				c.Layout = "NCHW"
			case shape[3] == 3 && shape[1] != 3:
				c.Layout = "NHWC"
			default:
				return c, fmt.Errorf("preprocess: cannot tell the layout of input shape %v: set layout NCHW or NHWC", shape)
			}
		}
		h, w := shape[2], shape[3]
		if c.Layout == "NHWC" {
			h, w = shape[1], shape[2]
		}
		if c.Width == 0 && w > 0 {
			c.Width = w
		}
		if c.Height == 0 && h > 0 {
			c.Height = h
		}
	} else if shape != nil {
		return c, fmt.Errorf("preprocess: model input shape %v is not 4-D", shape)
	}
	if c.Layout == "" {
		c.Layout = "NCHW"
	}
	return c, c.Validate()
}

// Validate checks a resolved configuration.
func (c Config) Validate() error {
	if c.Width <= 0 || c.Height <= 0 {
		return fmt.Errorf("preprocess: input size %d×%d: set width and height (the model does not fix them)", c.Width, c.Height)
	}
	switch c.Resize {
	case Stretch, Crop, Pad, "":
	default:
		return fmt.Errorf("preprocess: resize %q: want stretch, crop or pad", c.Resize)
	}
	for _, f := range []struct {
		name string
		v    []float32
	}{{"mean", c.Mean}, {"std", c.Std}, {"pad_color", c.PadColor}} {
		if len(f.v) != 0 && len(f.v) != 3 {
			return fmt.Errorf("preprocess: %s has %d values, want 3", f.name, len(f.v))
		}
	}
	for i, s := range c.Std {
		if s <= 0 {
			return fmt.Errorf("preprocess: std[%d] = %g, want > 0", i, s)
		}
	}
	if c.Range != 0 && c.Range != 1 && c.Range != 255 {
		return fmt.Errorf("preprocess: range %g, want 1 or 255", c.Range)
	}
	switch strings.ToUpper(c.Channels) {
	case "", "RGB", "BGR":
	default:
		return fmt.Errorf("preprocess: channels %q, want RGB or BGR", c.Channels)
	}
	switch strings.ToUpper(c.Layout) {
	case "", "NCHW", "NHWC":
	default:
		return fmt.Errorf("preprocess: layout %q, want NCHW or NHWC", c.Layout)
	}
	return nil
}

// Normalization is the model-space colour mapping the methods need.
func (c Config) Normalization() explain.Normalization {
	n := explain.Normalization{Range: c.Range, BGR: strings.EqualFold(c.Channels, "BGR")}
	if n.Range == 0 {
		n.Range = 1
	}
	copy(n.Mean[:], c.Mean)
	if len(c.Std) == 3 {
		copy(n.Std[:], c.Std)
	} else if len(c.Mean) == 3 {
		n.Std = [3]float32{1, 1, 1}
	}
	return n
}

// padRGB is the letterbox colour in 0–1 RGB.
func (c Config) padRGB() [3]float32 {
	var p [3]float32
	switch {
	case len(c.PadColor) == 3:
		copy(p[:], c.PadColor)
	case len(c.Mean) == 3:
		// Mean is in model channel order; the pad colour is RGB.
		copy(p[:], c.Mean)
		if strings.EqualFold(c.Channels, "BGR") {
			p[0], p[2] = p[2], p[0]
		}
	}
	return p
}
