package explain

import (
	"bufio"
	"bytes"
	"fmt"
	"math"
	"os"
	"strconv"
	"strings"

	"heedmap/tensor"
)

// ScoreKind says which function of the logits a method explains.
type ScoreKind int

const (
	// Logit is the pre-activation score of the class (the default, and what
	// Grad-CAM's definition uses).
	Logit ScoreKind = iota
	// Softmax is the class probability of a single-label classifier.
	Softmax
	// Sigmoid is the per-class probability of a multi-label classifier.
	Sigmoid
)

func (k ScoreKind) String() string {
	switch k {
	case Logit:
		return "logit"
	case Softmax:
		return "softmax"
	case Sigmoid:
		return "sigmoid"
	}
	return fmt.Sprintf("score(%d)", int(k))
}

// ParseScoreKind reads "logit", "softmax"/"probability" or "sigmoid".
func ParseScoreKind(s string) (ScoreKind, error) {
	switch strings.ToLower(s) {
	case "", "logit":
		return Logit, nil
	case "softmax", "probability", "prob":
		return Softmax, nil
	case "sigmoid":
		return Sigmoid, nil
	}
	return 0, fmt.Errorf("explain: score %q: want logit, softmax or sigmoid", s)
}

// Target is what is explained: the score of one class, or the summed score
// of a group of classes. An empty Classes means "the class the model
// predicts for the input"; methods resolve it once, on the unperturbed
// input, so every perturbed copy is scored for the same class.
type Target struct {
	Classes []int     // class indices; empty = predicted class
	Name    string    // for reports: class or group name
	Score   ScoreKind // function of the logits
}

// Predicted targets the top-scoring class.
func Predicted(kind ScoreKind) Target { return Target{Score: kind} }

// Class targets one class index.
func Class(i int, kind ScoreKind) Target {
	return Target{Classes: []int{i}, Name: fmt.Sprint(i), Score: kind}
}

// ClassByName targets the class with the given label.
func ClassByName(labels []string, name string, kind ScoreKind) (Target, error) {
	for i, l := range labels {
		if l == name {
			return Target{Classes: []int{i}, Name: name, Score: kind}, nil
		}
	}
	return Target{}, fmt.Errorf("explain: class %q is not in the labels", name)
}

// Group targets a named set of classes; its score is the sum of the member
// classes' probabilities (softmax, or sigmoid for multi-label models), e.g.
// "malignant" = melanoma + carcinoma. A sum of logits has no such meaning,
// so kind must be Softmax or Sigmoid.
func Group(labels []string, name string, members []string, kind ScoreKind) (Target, error) {
	if kind == Logit {
		return Target{}, fmt.Errorf("explain: group %q: a group's score is a sum of probabilities; use softmax or sigmoid", name)
	}
	if len(members) == 0 {
		return Target{}, fmt.Errorf("explain: group %q has no members", name)
	}
	t := Target{Name: name, Score: kind}
	for _, m := range members {
		c, err := ClassByName(labels, m, kind)
		if err != nil {
			return Target{}, fmt.Errorf("explain: group %q: %w", name, err)
		}
		t.Classes = append(t.Classes, c.Classes[0])
	}
	return t, nil
}

// ReadLabels reads a labels file: one class name per line, in logit order,
// surrounding spaces and CR line ends trimmed, a leading UTF-8 byte-order
// mark dropped; blank lines at the end are ignored. A name that appears
// twice is an error, since a target by name would be ambiguous.
func ReadLabels(path string) ([]string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("explain: labels: %w", err)
	}
	var out []string
	sc := bufio.NewScanner(bytes.NewReader(b))
	for sc.Scan() {
		line := sc.Text()
		if len(out) == 0 {
			// A UTF-8 byte-order mark, as some editors write, is not part
			// of the first class name.
			line = strings.TrimPrefix(line, "\ufeff")
		}
		out = append(out, strings.TrimSpace(line))
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("explain: labels %s: %w", path, err)
	}
	for len(out) > 0 && out[len(out)-1] == "" {
		out = out[:len(out)-1]
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("explain: labels file %s is empty", path)
	}
	seen := map[string]int{}
	for i, l := range out {
		if j, ok := seen[l]; ok && l != "" {
			return nil, fmt.Errorf("explain: labels %s: %q is on lines %d and %d", path, l, j+1, i+1)
		}
		seen[l] = i
	}
	return out, nil
}

// Resolve returns t with Classes filled in from one row of logits when it
// was empty (the argmax; the lowest index wins ties), and checks indices.
func (t Target) Resolve(logits []float32) (Target, error) {
	if len(logits) == 0 {
		return t, fmt.Errorf("explain: the model returned no logits")
	}
	if len(t.Classes) == 0 {
		best := 0
		for i, v := range logits {
			if v > logits[best] {
				best = i
			}
		}
		t.Classes = []int{best}
		if t.Name == "" {
			t.Name = fmt.Sprint(best)
		}
		return t, nil
	}
	for _, c := range t.Classes {
		if c < 0 || c >= len(logits) {
			return t, fmt.Errorf("explain: class %d out of range: the model has %d outputs", c, len(logits))
		}
	}
	t.Classes = append([]int(nil), t.Classes...)
	return t, nil
}

// Eval returns the score of one row of logits and writes ∂score/∂logits into
// grad (len(grad) == len(logits)) when grad is not nil. t must be resolved.
//
// Softmax: S = Σ_{c∈G} p_c, ∂S/∂z_j = p_j·[j∈G] − S·p_j.
// Sigmoid: S = Σ_{c∈G} σ(z_c), ∂S/∂z_c = σ(z_c)(1 − σ(z_c)).
func (t Target) Eval(logits []float32, grad []float32) float64 {
	for i := range grad {
		grad[i] = 0
	}
	switch t.Score {
	case Softmax:
		m := math.Inf(-1)
		for _, v := range logits {
			m = math.Max(m, float64(v))
		}
		var z float64
		for _, v := range logits {
			z += math.Exp(float64(v) - m)
		}
		var s float64
		for _, c := range t.Classes {
			s += math.Exp(float64(logits[c])-m) / z
		}
		if grad != nil {
			for j, v := range logits {
				grad[j] = float32(-s * math.Exp(float64(v)-m) / z)
			}
			for _, c := range t.Classes {
				grad[c] += float32(math.Exp(float64(logits[c])-m) / z)
			}
		}
		return s
	case Sigmoid:
		var s float64
		for _, c := range t.Classes {
			p := 1 / (1 + math.Exp(-float64(logits[c])))
			s += p
			if grad != nil {
				grad[c] += float32(p * (1 - p))
			}
		}
		return s
	default:
		var s float64
		for _, c := range t.Classes {
			s += float64(logits[c])
			if grad != nil {
				grad[c]++
			}
		}
		return s
	}
}

// Scores returns the score of every row of a [N, K] logits tensor.
func (t Target) Scores(logits *tensor.Tensor) ([]float64, error) {
	n, k, err := logitsShape(logits)
	if err != nil {
		return nil, err
	}
	out := make([]float64, n)
	for i := range out {
		out[i] = t.Eval(logits.F32[i*k:(i+1)*k], nil)
	}
	return out, nil
}

// Seed is the function Network.Gradient takes: ∂score/∂logits per row.
func (t Target) Seed() func(*tensor.Tensor) (*tensor.Tensor, error) {
	return func(logits *tensor.Tensor) (*tensor.Tensor, error) {
		n, k, err := logitsShape(logits)
		if err != nil {
			return nil, err
		}
		g := tensor.New(n, k)
		for i := 0; i < n; i++ {
			t.Eval(logits.F32[i*k:(i+1)*k], g.F32[i*k:(i+1)*k])
		}
		return g, nil
	}
}

func logitsShape(l *tensor.Tensor) (n, k int, err error) {
	if l == nil || l.DType != tensor.Float32 || len(l.Shape) != 2 {
		return 0, 0, fmt.Errorf("explain: logits must be a float [N, K] tensor, got %v", l)
	}
	return l.Shape[0], l.Shape[1], nil
}

// ParseTarget reads a target specification as a user writes it:
//
//	"" or "predicted"       the class the model predicts
//	"3"                     class index 3 (named from labels when given)
//	"melanoma"              the class with that label
//	"malignant=melanoma+carcinoma"
//	                        a named group (see Group; kind must be softmax
//	                        or sigmoid)
//
// A label that is itself a number is reached by name only when it is not a
// valid index; put such labels in a group of one to be explicit.
func ParseTarget(spec string, labels []string, kind ScoreKind) (Target, error) {
	spec = strings.TrimSpace(spec)
	if spec == "" || spec == "predicted" {
		return Predicted(kind), nil
	}
	if name, members, ok := strings.Cut(spec, "="); ok {
		var ms []string
		for _, m := range strings.Split(members, "+") {
			if m = strings.TrimSpace(m); m != "" {
				ms = append(ms, m)
			}
		}
		return Group(labels, strings.TrimSpace(name), ms, kind)
	}
	if i, err := strconv.Atoi(spec); err == nil && i >= 0 && (len(labels) == 0 || i < len(labels)) {
		t := Class(i, kind)
		if i < len(labels) {
			t.Name = labels[i]
		}
		return t, nil
	}
	if len(labels) == 0 {
		return Target{}, fmt.Errorf("explain: target %q: not a class index, and no labels file to look the name up in", spec)
	}
	return ClassByName(labels, spec, kind)
}
