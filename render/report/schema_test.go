package report

import (
	"encoding/json"
	"os"
	"reflect"
	"strings"
	"testing"
)

// TestSchemaDocumented walks the Go types behind report.json and checks
// that every JSON field name appears, in backquotes, in SCHEMA.md, so the
// user-facing schema cannot fall behind the code. Types with their own
// JSON encoding (measure.Value, measure.Sign, time.Time) are leaves.
func TestSchemaDocumented(t *testing.T) {
	doc, err := os.ReadFile("SCHEMA.md")
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(doc), "`"+Schema+"`") {
		t.Errorf("SCHEMA.md does not name the schema %q", Schema)
	}
	marshaler := reflect.TypeFor[json.Marshaler]()
	seen := map[reflect.Type]bool{}
	var walk func(reflect.Type, string)
	walk = func(tp reflect.Type, path string) {
		for tp.Kind() == reflect.Pointer || tp.Kind() == reflect.Slice || tp.Kind() == reflect.Map {
			tp = tp.Elem()
		}
		if tp.Kind() != reflect.Struct || seen[tp] || tp.Implements(marshaler) || reflect.PointerTo(tp).Implements(marshaler) {
			return
		}
		seen[tp] = true
		for i := 0; i < tp.NumField(); i++ {
			f := tp.Field(i)
			if !f.IsExported() {
				continue
			}
			tag := f.Tag.Get("json")
			name, _, _ := strings.Cut(tag, ",")
			if name == "-" {
				continue
			}
			if f.Anonymous && name == "" {
				walk(f.Type, path)
				continue
			}
			if name == "" {
				name = f.Name
			}
			if !strings.Contains(string(doc), "`"+name+"`") {
				t.Errorf("report.json field %s.%s is not documented in SCHEMA.md", path, name)
			}
			walk(f.Type, path+"."+name)
		}
	}
	walk(reflect.TypeFor[Report](), "report")
	if len(seen) < 10 {
		t.Errorf("walked only %d types", len(seen))
	}
}
