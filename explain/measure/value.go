package measure

import (
	"encoding/json"
	"fmt"
	"math"
)

// Value is a measured number or an explicit "undefined" with the reason.
// The zero Value is undefined with an empty reason; construct values with
// [Num] and [Undef] so that every undefined value says why.
type Value struct {
	V      float64 // meaningful only when OK
	OK     bool
	Reason string // why the value is undefined; "" when OK
}

// Num returns a defined value. A non-finite x becomes undefined, so NaN can
// never leak into a report.
func Num(x float64) Value {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return Value{Reason: fmt.Sprintf("non-finite result %v", x)}
	}
	return Value{V: x, OK: true}
}

// Undef returns an undefined value with the given reason.
func Undef(reason string) Value { return Value{Reason: reason} }

// Float returns the value and whether it is defined.
func (v Value) Float() (float64, bool) { return v.V, v.OK }

func (v Value) String() string {
	if !v.OK {
		return "undefined (" + v.Reason + ")"
	}
	return fmt.Sprintf("%.4g", v.V)
}

type valueJSON struct {
	Value  *float64 `json:"value"`
	Reason string   `json:"reason,omitempty"`
}

// MarshalJSON encodes {"value": x} or {"value": null, "reason": "..."}.
func (v Value) MarshalJSON() ([]byte, error) {
	if v.OK {
		x := v.V
		return json.Marshal(valueJSON{Value: &x})
	}
	r := v.Reason
	if r == "" {
		r = "undefined"
	}
	return json.Marshal(valueJSON{Reason: r})
}

// UnmarshalJSON is the inverse of MarshalJSON.
func (v *Value) UnmarshalJSON(b []byte) error {
	var j valueJSON
	if err := json.Unmarshal(b, &j); err != nil {
		return err
	}
	if j.Value == nil {
		*v = Undef(j.Reason)
		return nil
	}
	*v = Num(*j.Value)
	return nil
}
