package measure

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"

	"gopkg.in/yaml.v3"
)

// An acceptance criteria file is YAML with one top-level key, criteria, a
// list of entries with these keys:
//
//	criteria:
//	  - id: ig-on-lesion                 # optional label shown in the verdict table
//	    method: integrated-gradients     # a method name as it appears in the results
//	    statistic: median_inside_mass_lower95
//	    compare: ">="                    # ">=" or "<="
//	    threshold: 0.5
//
// method, statistic, compare and threshold are required; any other key is an
// error. The statistic names are listed by [Statistics]. Errors name the
// file and line.

// Criterion is one acceptance criterion.
type Criterion struct {
	ID        string  `json:"id,omitempty"`
	Method    string  `json:"method"`
	Statistic string  `json:"statistic"`
	Compare   string  `json:"compare"`
	Threshold float64 `json:"threshold"`
	Line      int     `json:"line"` // line of the entry in the criteria file
}

// Verdict is a criterion with the measured value and the outcome. A
// criterion whose statistic is undefined fails, with the reason in Note.
type Verdict struct {
	Criterion
	Measured Value  `json:"measured"`
	Pass     bool   `json:"pass"`
	Note     string `json:"note,omitempty"`
}

// StatisticDoc names and describes one statistic a criterion can test.
type StatisticDoc struct {
	Name string
	Doc  string
	get  func(*MethodStats) Value
}

var statistics = []StatisticDoc{
	{"mean_inside_mass", "mean over images of the relevance mass inside the lesion (fraction, 0–1)", func(m *MethodStats) Value { return m.MeanInside }},
	{"mean_inside_mass_lower95", "lower end of the 95 % percentile-bootstrap interval of the mean inside mass", func(m *MethodStats) Value { return m.MeanInsideCI.Lo }},
	{"mean_inside_mass_upper95", "upper end of the 95 % percentile-bootstrap interval of the mean inside mass", func(m *MethodStats) Value { return m.MeanInsideCI.Hi }},
	{"median_inside_mass", "median over images of the inside mass (fraction, 0–1)", func(m *MethodStats) Value { return m.MedianInside }},
	{"median_inside_mass_lower95", "lower end of the 95 % percentile-bootstrap interval of the median inside mass", func(m *MethodStats) Value { return m.MedianInsideCI.Lo }},
	{"median_inside_mass_upper95", "upper end of the 95 % percentile-bootstrap interval of the median inside mass", func(m *MethodStats) Value { return m.MedianInsideCI.Hi }},
	{"mean_rank_accuracy", "mean relevance rank accuracy |top-K ∩ M| / K (fraction, 0–1)", func(m *MethodStats) Value { return m.MeanRank }},
	{"mean_far_mass", "mean fraction of relevance beyond the peri-lesional band", func(m *MethodStats) Value { return m.MeanFar }},
	{"pointing_accuracy", "pointing-game hits / images with a defined result", func(m *MethodStats) Value { return m.Pointing.P }},
	{"pointing_accuracy_lower95", "lower end of the Wilson 95 % interval of the pointing accuracy", func(m *MethodStats) Value { return m.Pointing.CI.Lo }},
	{"pointing_accuracy_upper95", "upper end of the Wilson 95 % interval of the pointing accuracy", func(m *MethodStats) Value { return m.Pointing.CI.Hi }},
	{"flagged_rate", "flagged images / images with a usable map (fraction, 0–1)", func(m *MethodStats) Value { return m.Flagged.P }},
	{"flagged_rate_lower95", "lower end of the Wilson 95 % interval of the flagged rate", func(m *MethodStats) Value { return m.Flagged.CI.Lo }},
	{"flagged_rate_upper95", "upper end of the Wilson 95 % interval of the flagged rate", func(m *MethodStats) Value { return m.Flagged.CI.Hi }},
	{"undefined_count", "number of images whose inside mass is undefined", func(m *MethodStats) Value { return Num(float64(m.Undefined)) }},
}

// Statistics lists the statistic names a criterion may use, with a
// one-line description each.
func Statistics() []StatisticDoc { return append([]StatisticDoc(nil), statistics...) }

func lookupStatistic(name string) (StatisticDoc, bool) {
	for _, s := range statistics {
		if s.Name == name {
			return s, true
		}
	}
	return StatisticDoc{}, false
}

type criterionYAML struct {
	ID        string   `yaml:"id"`
	Method    string   `yaml:"method"`
	Statistic string   `yaml:"statistic"`
	Compare   string   `yaml:"compare"`
	Threshold *float64 `yaml:"threshold"`
}

// ParseCriteria reads an acceptance criteria file; file names the source in
// errors.
func ParseCriteria(data []byte, file string) ([]Criterion, error) {
	var root yaml.Node
	dec := yaml.NewDecoder(bytes.NewReader(data))
	if err := dec.Decode(&root); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("%s: empty criteria file", file)
		}
		return nil, fmt.Errorf("%s: %v", file, err)
	}
	doc := &root
	if doc.Kind == yaml.DocumentNode && len(doc.Content) == 1 {
		doc = doc.Content[0]
	}
	if doc.Kind != yaml.MappingNode {
		return nil, fmt.Errorf("%s:%d: want a mapping with key \"criteria\"", file, doc.Line)
	}
	var list *yaml.Node
	for i := 0; i+1 < len(doc.Content); i += 2 {
		k := doc.Content[i]
		if k.Value != "criteria" {
			return nil, fmt.Errorf("%s:%d: unknown key %q (want \"criteria\")", file, k.Line, k.Value)
		}
		list = doc.Content[i+1]
	}
	if list == nil || list.Kind != yaml.SequenceNode {
		return nil, fmt.Errorf("%s:%d: \"criteria\" must be a list", file, doc.Line)
	}
	var out []Criterion
	for _, n := range list.Content {
		var c criterionYAML
		if n.Kind != yaml.MappingNode {
			return nil, fmt.Errorf("%s:%d: each criterion must be a mapping", file, n.Line)
		}
		// Check keys by hand: yaml.v3's KnownFields applies only to a
		// Decoder, and we want the offending key's own line.
		for i := 0; i < len(n.Content); i += 2 {
			switch k := n.Content[i]; k.Value {
			case "id", "method", "statistic", "compare", "threshold":
			default:
				return nil, fmt.Errorf("%s:%d: unknown key %q in criterion (want id, method, statistic, compare, threshold)", file, k.Line, k.Value)
			}
		}
		if err := n.Decode(&c); err != nil {
			return nil, fmt.Errorf("%s:%d: %v", file, n.Line, err)
		}
		line := n.Line
		keyLine := func(key string) int {
			for i := 0; i+1 < len(n.Content); i += 2 {
				if n.Content[i].Value == key {
					return n.Content[i].Line
				}
			}
			return line
		}
		switch {
		case strings.TrimSpace(c.Method) == "":
			return nil, fmt.Errorf("%s:%d: criterion has no method", file, line)
		case c.Statistic == "":
			return nil, fmt.Errorf("%s:%d: criterion has no statistic", file, line)
		case c.Threshold == nil:
			return nil, fmt.Errorf("%s:%d: criterion has no threshold", file, line)
		}
		if _, ok := lookupStatistic(c.Statistic); !ok {
			names := make([]string, len(statistics))
			for i, s := range statistics {
				names[i] = s.Name
			}
			return nil, fmt.Errorf("%s:%d: unknown statistic %q (known: %s)", file, keyLine("statistic"), c.Statistic, strings.Join(names, ", "))
		}
		if c.Compare != ">=" && c.Compare != "<=" {
			return nil, fmt.Errorf("%s:%d: compare %q must be \">=\" or \"<=\"", file, keyLine("compare"), c.Compare)
		}
		if math.IsNaN(*c.Threshold) || math.IsInf(*c.Threshold, 0) {
			return nil, fmt.Errorf("%s:%d: threshold must be a finite number", file, keyLine("threshold"))
		}
		out = append(out, Criterion{ID: c.ID, Method: c.Method, Statistic: c.Statistic, Compare: c.Compare, Threshold: *c.Threshold, Line: line})
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("%s:%d: no criteria", file, list.Line)
	}
	return out, nil
}

// Evaluate checks every criterion against the overall statistics. A method
// with no results is an error naming the criterion's line, since a
// misspelt method would otherwise read as a failure of the model.
func Evaluate(cs []Criterion, s *Summary, file string) ([]Verdict, error) {
	out := make([]Verdict, 0, len(cs))
	for _, c := range cs {
		st, ok := lookupStatistic(c.Statistic)
		if !ok {
			return nil, fmt.Errorf("%s:%d: unknown statistic %q", file, c.Line, c.Statistic)
		}
		ms, ok := s.Method(c.Method)
		if !ok {
			var have []string
			for _, m := range s.Methods {
				have = append(have, m.Method)
			}
			return nil, fmt.Errorf("%s:%d: method %q was not measured (measured: %s)", file, c.Line, c.Method, strings.Join(have, ", "))
		}
		v := Verdict{Criterion: c, Measured: st.get(ms)}
		if x, ok := v.Measured.Float(); ok {
			if c.Compare == ">=" {
				v.Pass = x >= c.Threshold
			} else {
				v.Pass = x <= c.Threshold
			}
		} else {
			v.Note = "statistic undefined: " + v.Measured.Reason
		}
		out = append(out, v)
	}
	return out, nil
}
