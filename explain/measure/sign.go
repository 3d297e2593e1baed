package measure

import (
	"fmt"
	"strings"
)

// Sign says how a method's raw map becomes the non-negative relevance A⁺ the
// measures use.
type Sign int

const (
	// Positive keeps max(A, 0). For methods whose sign means "supports the
	// class" versus "speaks against it" (occlusion, integrated gradients,
	// gradient×input, Grad-CAM, RISE) only supporting evidence should count
	// as attention on a region; negative evidence on the background is not
	// a sign that the model looked there for the class.
	Positive Sign = iota + 1
	// Absolute uses |A|. Plain gradients and SmoothGrad measure sensitivity;
	// their sign depends on the local slope, not on support, so both signs
	// count (Simonyan et al. 2014 take the gradient magnitude).
	Absolute
)

func (s Sign) String() string {
	switch s {
	case Positive:
		return "positive-part"
	case Absolute:
		return "absolute-value"
	}
	return fmt.Sprintf("Sign(%d)", int(s))
}

// Canonical method names. The sign table keys on these after
// normalisation (lower case, with spaces, '-', '_', '×' and '*' removed), so
// "Grad-CAM", "gradcam" and "grad_cam" are the same method.
const (
	MethodOcclusion           = "occlusion"
	MethodGradient            = "gradient"
	MethodGradientXInput      = "gradient-x-input"
	MethodIntegratedGradients = "integrated-gradients"
	MethodSmoothGrad          = "smoothgrad"
	MethodGradCAM             = "grad-cam"
	MethodRISE                = "rise"
	MethodSmoothGradIG        = "smoothgrad-ig"
)

var signTable = map[string]Sign{
	"occlusion":            Positive,
	"occlusionsensitivity": Positive,
	"integratedgradients":  Positive,
	"ig":                   Positive,
	"gradientxinput":       Positive,
	"gradxinput":           Positive,
	"gradientinput":        Positive,
	"gradcam":              Positive,
	"rise":                 Positive,
	// SmoothGrad over integrated gradients averages signed IG maps, so it
	// keeps IG's convention.
	"smoothgradig": Positive,
	"gradient":     Absolute,
	"saliency":     Absolute,
	"smoothgrad":   Absolute,
}

func normalise(name string) string {
	var b strings.Builder
	for _, r := range strings.ToLower(name) {
		switch r {
		case ' ', '-', '_', '*', '×', '.':
			continue
		}
		b.WriteRune(r)
	}
	return b.String()
}

// SignFor returns the sign convention of a method by name. Unknown names are
// an error rather than a guess, because the wrong convention silently
// changes every mass.
func SignFor(method string) (Sign, error) {
	if s, ok := signTable[normalise(method)]; ok {
		return s, nil
	}
	return 0, fmt.Errorf("measure: no sign convention for method %q (known: occlusion, gradient, gradient-x-input, integrated-gradients, smoothgrad, smoothgrad-ig, grad-cam, rise)", method)
}

// apply converts a raw value to relevance.
func (s Sign) apply(x float32) float64 {
	v := float64(x)
	if s == Absolute {
		if v < 0 {
			return -v
		}
		return v
	}
	if v < 0 {
		return 0
	}
	return v
}
