package engine

import (
	"errors"
	"runtime"
	"slices"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"heedmap/tensor"
)

// TestEachImageLanes checks Graph.eachImage on two cores: every image is
// run once, two images run at the same time (each call below waits for a
// second one to start, which cannot happen on one goroutine), the team
// recruits no helper meanwhile, backward claims from the last image, no
// lanes run for fewer images than cores, and the error of the lowest
// failing image is returned.
func TestEachImageLanes(t *testing.T) {
	defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(2))
	g := &Graph{team: newTeam()}
	for _, backward := range []bool{false, true} {
		const n = 7
		var calls [n]atomic.Int32
		var order []int
		first := make(chan int, n)
		met := make(chan struct{})
		var inside atomic.Int32
		err := g.eachImage(1, n, backward, func(i int) error {
			calls[i].Add(1)
			first <- i
			if g.team.solo.Load() == 0 {
				t.Errorf("image %d ran with the team recruiting helpers", i)
			}
			if inside.Add(1) == 2 {
				close(met)
			}
			select {
			case <-met:
			case <-time.After(5 * time.Second):
				t.Errorf("image %d: no second image started within 5 s", i)
			}
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		close(first)
		for i := range first {
			order = append(order, i)
		}
		for i := range n {
			want := int32(1)
			if i == 0 {
				want = 0
			}
			if got := calls[i].Load(); got != want {
				t.Errorf("backward %v: image %d ran %d times, want %d", backward, i, got, want)
			}
		}
		if g.team.solo.Load() != 0 {
			t.Errorf("team left in solo mode")
		}
		// The first two claims are the first two images in claim order,
		// in either order of arrival.
		head := []int{1, 2}
		if backward {
			head = []int{6, 5}
		}
		if got := order[:2]; !slices.Contains(got, head[0]) || !slices.Contains(got, head[1]) {
			t.Errorf("backward %v: first images run %v, want %v", backward, got, head)
		}
	}
	// Fewer images than cores: one at a time, the team helping.
	runtime.GOMAXPROCS(4)
	if err := g.eachImage(0, 3, false, func(i int) error {
		if g.team.solo.Load() != 0 {
			t.Errorf("3 images on 4 cores: image %d ran in a lane", i)
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	runtime.GOMAXPROCS(2)
	boom := errors.New("boom")
	err := g.eachImage(0, 6, false, func(i int) error {
		if i == 3 || i == 4 {
			return boom
		}
		return nil
	})
	if !errors.Is(err, boom) || !strings.Contains(err.Error(), "image 3 ") {
		t.Errorf("got %v, want image 3's error", err)
	}
}

// TestSplitLanesMatchAlone runs the committed compact image-wise networks
// on a batch of five images on two cores, which Run takes in lanes (one
// image per core), and checks that each image's logits and input gradient
// are bit for bit those of the image run alone.
func TestSplitLanesMatchAlone(t *testing.T) {
	defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(2))
	for _, name := range []string{"mobilenet_v2", "efficientnet_b0"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			n.g.splitFloor = 0
			per := n.x.Len() / n.x.Shape[0]
			const batch = 5
			x := tensor.New(append([]int{batch}, n.x.Shape[1:]...)...)
			for i := range batch {
				src := n.x.F32[(i%n.x.Shape[0])*per:][:per]
				for j, v := range src {
					x.F32[i*per+j] = v * (1 + 0.1*float32(i))
				}
			}
			run := func(x *tensor.Tensor) (*Pass, []float32, []float32) {
				p, g := n.runBackward(t, x, RunOptions{}, n.meta.Input)
				logits, _ := p.Value(n.meta.Output)
				return p, logits.F32, g[n.meta.Input].F32
			}
			p, logits, grad := run(x)
			if len(p.parts) != batch {
				t.Fatalf("batch not taken image by image (%d parts)", len(p.parts))
			}
			k := len(logits) / batch
			for i := range batch {
				_, l1, g1 := run(tensor.FromFloat32(x.F32[i*per:(i+1)*per], append([]int{1}, x.Shape[1:]...)...))
				if !slices.Equal(l1, logits[i*k:(i+1)*k]) {
					t.Errorf("image %d: logits in the batch differ from the image alone", i)
				}
				if !slices.Equal(g1, grad[i*per:(i+1)*per]) {
					t.Errorf("image %d: input gradient in the batch differs from the image alone", i)
				}
			}
		})
	}
}
