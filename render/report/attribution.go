package report

import (
	"fmt"
	"sort"
	"strings"

	"heedmap/explain/measure"
	"heedmap/explain/preprocess"
)

// Attribution is what one method did for one image: the target and score
// it explained, the settings it used (defaults resolved) and the
// conditions a user should be told about. It sits beside the method's
// measurements (ImageRecord.Results) so every per-image number can be
// traced to the exact settings that produced it.
type Attribution struct {
	Method    string   `json:"method"`
	Target    string   `json:"target"`
	ScoreKind string   `json:"score_kind"` // logit, softmax or sigmoid
	Params    []Param  `json:"params"`
	Warnings  []string `json:"warnings,omitempty"`
	// CompletenessGap is integrated gradients' relative completeness gap
	// |Σ IG − (F(x) − F(x′))| / |F(x) − F(x′)| (a fraction; Sundararajan et
	// al. 2017); nil for other methods.
	CompletenessGap *measure.Value `json:"completeness_gap,omitempty"`
}

// Param is one named method setting as text.
type Param struct {
	Name  string `json:"name"`
	Value string `json:"value"`
}

// Attribution returns the record of method, or nil.
func (im *ImageRecord) Attribution(method string) *Attribution {
	for i := range im.Attributions {
		if im.Attributions[i].Method == method {
			return &im.Attributions[i]
		}
	}
	return nil
}

// WarningKind is the text of a warning with every number replaced by
// "#": warnings of one kind that differ only in a measured value (a
// completeness gap of 6.1 % on one image and 7.4 % on another) share it.
func WarningKind(text string) string {
	var b strings.Builder
	num := false
	for _, r := range text {
		isNum := r >= '0' && r <= '9' || (num && (r == '.' || r == 'e'))
		if isNum {
			if !num {
				b.WriteByte('#')
			}
			num = true
			continue
		}
		num = false
		b.WriteRune(r)
	}
	return b.String()
}

// warningGroup is one kind of warning (see WarningKind) and where it
// occurred.
type warningGroup struct {
	Text   string   // the first occurrence's text
	Varies bool     // other occurrences differ in their numbers
	Count  int      // image × method occurrences
	Images []string // image ids, first few
	More   int      // ids not listed
}

// maxWarningImages bounds the ids listed per warning on the page.
const maxWarningImages = 12

// warningGroups collects the kinds of warning of every image, most
// frequent first (ties by text).
func warningGroups(images []ImageRecord) []warningGroup {
	idx := map[string]int{}
	var out []warningGroup
	for _, im := range images {
		for _, a := range im.Attributions {
			for _, w := range a.Warnings {
				k := a.Method + "\x00" + WarningKind(w)
				i, ok := idx[k]
				if !ok {
					i = len(out)
					idx[k] = i
					out = append(out, warningGroup{Text: WarningLine(a.Method, w)})
				}
				g := &out[i]
				g.Varies = g.Varies || WarningLine(a.Method, w) != g.Text
				g.Count++
				if n := len(g.Images); n > 0 && g.Images[n-1] == im.ID {
					continue
				}
				if len(g.Images) < maxWarningImages {
					g.Images = append(g.Images, im.ID)
				} else {
					g.More++
				}
			}
		}
	}
	sort.SliceStable(out, func(i, j int) bool {
		if out[i].Count != out[j].Count {
			return out[i].Count > out[j].Count
		}
		return out[i].Text < out[j].Text
	})
	return out
}

// WarningLine is a method's warning as one line that names the method:
// text as it is when it already starts with the method's name (methods
// usually prefix their own), else "method: text".
func WarningLine(method, text string) string {
	low := strings.ToLower(text)
	if strings.HasPrefix(low, method) || strings.HasPrefix(low, strings.ReplaceAll(method, "-", " ")) {
		return text
	}
	return method + ": " + text
}

// imageWarnings lists an image's warnings, one WarningLine each.
func imageWarnings(im *ImageRecord) []string {
	var out []string
	for _, a := range im.Attributions {
		for _, w := range a.Warnings {
			out = append(out, WarningLine(a.Method, w))
		}
	}
	return out
}

// PreprocessText describes a resolved preprocessing configuration in one
// line for the report header.
func PreprocessText(c *preprocess.Config) string {
	if c == nil {
		return ""
	}
	f3 := func(v []float32) string {
		if len(v) == 0 {
			return "none"
		}
		s := make([]string, len(v))
		for i, x := range v {
			s[i] = fmt.Sprintf("%g", x)
		}
		return strings.Join(s, ", ")
	}
	rng := c.Range
	if rng == 0 {
		rng = 1
	}
	ch := c.Channels
	if ch == "" {
		ch = "RGB"
	}
	return fmt.Sprintf("%d×%d model input, resize %s, pixel range 0–%g, mean %s, std %s, channel order %s, layout %s, pad colour %s (0–1 RGB)",
		c.Width, c.Height, c.Resize, rng, f3(c.Mean), f3(c.Std), strings.ToUpper(ch), c.Layout, f3(c.PadColor))
}
