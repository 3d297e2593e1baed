package colour

import "math"

// CIELab is a colour in CIE 1976 L*a*b* (CIE 15), relative to a stated white.
type CIELab struct{ L, A, B float64 }

// CIELab converts x to CIE 1976 L*a*b* relative to white, with the CIE 15
// definition: f(t) = t^(1/3) above (6/29)³ and t/(3·(6/29)²) + 4/29 below,
// L* = 116·f(Y/Yn) − 16, a* = 500·(f(X/Xn) − f(Y/Yn)),
// b* = 200·(f(Y/Yn) − f(Z/Zn)).
func (x XYZ) CIELab(white XYZ) CIELab {
	fx, fy, fz := labF(x.X/white.X), labF(x.Y/white.Y), labF(x.Z/white.Z)
	return CIELab{116*fy - 16, 500 * (fx - fy), 200 * (fy - fz)}
}

// XYZ converts back to XYZ relative to white.
func (c CIELab) XYZ(white XYZ) XYZ {
	fy := (c.L + 16) / 116
	fx := fy + c.A/500
	fz := fy - c.B/200
	return XYZ{white.X * labFInv(fx), white.Y * labFInv(fy), white.Z * labFInv(fz)}
}

const labDelta = 6.0 / 29

func labF(t float64) float64 {
	if t > labDelta*labDelta*labDelta {
		return math.Cbrt(t)
	}
	return t/(3*labDelta*labDelta) + 4.0/29
}

func labFInv(f float64) float64 {
	if f > labDelta {
		return f * f * f
	}
	return 3 * labDelta * labDelta * (f - 4.0/29)
}
