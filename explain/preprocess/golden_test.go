package preprocess

import (
	"context"
	"fmt"
	"image"
	"math"
	"os"
	"strconv"
	"strings"
	"testing"
)

// Resampling against PIL's BILINEAR resize (the filter torchvision's Resize
// applies to PIL images): golden from testdata/resize_golden.py, run with
// /usr/bin/python3 (Debian python3-pil 9.4). PIL rounds to 8 bits; we keep
// 16, so values may differ by the rounding plus the two libraries'
// fixed-point arithmetic: we allow 1/255.
func TestResizeMatchesPIL(t *testing.T) {
	b, err := os.ReadFile("testdata/resize_golden.txt")
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSpace(string(b)), "\n")
	for i := 0; i+1 < len(lines); i += 2 {
		head := strings.Fields(lines[i])
		w, _ := strconv.Atoi(head[1])
		h, _ := strconv.Atoi(head[2])
		mode := Stretch
		if head[0] == "crop" {
			mode = Crop
		}
		p, err := New(Config{Width: w, Height: h, Resize: mode})
		if err != nil {
			t.Fatal(err)
		}
		in, _, err := p.Load(context.Background(), "testdata/pattern.png")
		if err != nil {
			t.Fatal(err)
		}
		vals := strings.Fields(lines[i+1])
		if len(vals) != 3*w*h {
			t.Fatalf("%s: %d golden values", head[0], len(vals))
		}
		var worst float64
		for j, s := range vals {
			v, _ := strconv.Atoi(s)
			worst = math.Max(worst, math.Abs(float64(in.Seen.Pix[j])-float64(v)/255))
		}
		t.Logf("%s: max |ours − PIL| = %.4f (%.2f/255)", head[0], worst, worst*255)
		if worst > 1.0/255 {
			t.Errorf("%s: differs from PIL by %.2f/255", head[0], worst*255)
		}
	}
}

// A CMYK JPEG written by PIL (testdata/cmyk_golden.py, /usr/bin/python3,
// python3-pil 9.4, Adobe-style inverted storage) decodes to the stated rule
// R = (1−C)(1−K), G = (1−M)(1−K), B = (1−Y)(1−K) at the centre of each flat
// ink block; JPEG quantisation at quality 100 is allowed 3/255.
func TestCMYKJPEGFromPIL(t *testing.T) {
	src, err := Load("testdata/cmyk.jpg")
	if err != nil {
		t.Fatal(err)
	}
	if src.Format != "jpeg" {
		t.Fatalf("format %q", src.Format)
	}
	if _, ok := src.Image.(*image.CMYK); !ok {
		t.Errorf("decoded as %T, want a CMYK image", src.Image)
	}
	b, err := os.ReadFile("testdata/cmyk_golden.txt")
	if err != nil {
		t.Fatal(err)
	}
	rgb := ToRGB(src.Image)
	for _, line := range strings.Split(strings.TrimSpace(string(b)), "\n") {
		var x, y int
		var c, m, yy, k float64
		if _, err := fmt.Sscan(line, &x, &y, &c, &m, &yy, &k); err != nil {
			t.Fatal(err)
		}
		c, m, yy, k = c/255, m/255, yy/255, k/255
		want := [3]float64{(1 - c) * (1 - k), (1 - m) * (1 - k), (1 - yy) * (1 - k)}
		got := rgb.At(x, y)
		for i := range want {
			if math.Abs(float64(got[i])-want[i]) > 3.0/255 {
				t.Errorf("block at (%d,%d): RGB %v, want %v", x, y, got, want)
				break
			}
		}
	}
}
