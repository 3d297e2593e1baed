package batch

import (
	"bytes"
	"strings"
	"testing"
	"time"
)

func TestProgressPlainAndTerminal(t *testing.T) {
	var plain bytes.Buffer
	p := newProgress(&plain, false, time.Hour, 4)
	p.start()
	p.done(true)
	p.done(false)
	p.stop()
	if s := plain.String(); !strings.HasPrefix(s, "heedmap: 2/4 images done, 1 failed") || strings.Contains(s, "\r") {
		t.Errorf("plain progress %q", s)
	}
	var term bytes.Buffer
	p = newProgress(&term, true, time.Hour, 4)
	p.start()
	p.done(true)
	p.done(true)
	p.stop()
	if s := term.String(); !strings.HasPrefix(s, "\r[###############---------------] 2/4") || !strings.Contains(s, "img/s") || !strings.Contains(s, "ETA") {
		t.Errorf("terminal progress %q", s)
	}
}
