package batch

import (
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"
)

// IsTerminal reports whether f is a character device (an interactive
// terminal), where a redrawn progress bar makes sense.
func IsTerminal(f *os.File) bool {
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}

// progress reports finished images. On a terminal it redraws one line with
// a bar, rate and ETA; elsewhere (logs of batch jobs) it prints a plain
// line every interval so log files stay short.
type progress struct {
	w        io.Writer
	terminal bool
	interval time.Duration
	total    int

	mu     sync.Mutex
	n, bad int
	t0     time.Time
	quit   chan struct{}
	wg     sync.WaitGroup
}

func newProgress(w io.Writer, terminal bool, interval time.Duration, total int) *progress {
	if interval <= 0 {
		interval = 10 * time.Second
		if terminal {
			interval = 200 * time.Millisecond
		}
	}
	return &progress{w: w, terminal: terminal, interval: interval, total: total, quit: make(chan struct{})}
}

func (p *progress) start() {
	p.t0 = time.Now()
	if p.w == nil {
		return
	}
	p.wg.Add(1)
	go func() {
		defer p.wg.Done()
		t := time.NewTicker(p.interval)
		defer t.Stop()
		for {
			select {
			case <-t.C:
				p.print(false)
			case <-p.quit:
				return
			}
		}
	}()
}

func (p *progress) done(ok bool) {
	p.mu.Lock()
	p.n++
	if !ok {
		p.bad++
	}
	p.mu.Unlock()
}

func (p *progress) count() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.n
}

func (p *progress) stop() {
	close(p.quit)
	p.wg.Wait()
	if p.w != nil {
		p.print(true)
	}
}

func (p *progress) print(final bool) {
	p.mu.Lock()
	n, bad := p.n, p.bad
	p.mu.Unlock()
	el := time.Since(p.t0).Seconds()
	rate := 0.0
	if el > 0 {
		rate = float64(n) / el
	}
	eta := "?"
	if rate > 0 {
		eta = time.Duration(float64(p.total-n) / rate * float64(time.Second)).Round(time.Second).String()
	}
	if p.terminal {
		const width = 30
		fill := 0
		if p.total > 0 {
			fill = width * n / p.total
		}
		fmt.Fprintf(p.w, "\r[%s%s] %d/%d  %d failed  %.2f img/s  ETA %s ", strings.Repeat("#", fill), strings.Repeat("-", width-fill), n, p.total, bad, rate, eta)
		if final {
			fmt.Fprintln(p.w)
		}
		return
	}
	fmt.Fprintf(p.w, "heedmap: %d/%d images done, %d failed, %.2f img/s, ETA %s\n", n, p.total, bad, rate, eta)
}
