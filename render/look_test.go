package render

import (
	"fmt"
	"os"
	"path/filepath"
	"testing"
)

func TestLook(t *testing.T) {
	dir := os.Getenv("HEEDMAP_LOOK")
	if dir == "" {
		t.Skip()
	}
	s := newSynth(224, 224)
	for _, signed := range []bool{false, true} {
		img, err := Overlay(s.scene(signed))
		if err != nil {
			t.Fatal(err)
		}
		name := "overlay_unsigned.png"
		if signed {
			name = "overlay_signed.png"
		}
		if err := WritePNG(filepath.Join(dir, name), img); err != nil {
			t.Fatal(err)
		}
	}
}

func TestLookPanel(t *testing.T) {
	dir := os.Getenv("HEEDMAP_LOOK")
	if dir == "" {
		t.Skip()
	}
	s := newSynth(224, 224)
	for _, n := range []int{2, 4, 5, 7} {
		img, err := Panel(s.panel(n))
		if err != nil {
			t.Fatal(err)
		}
		if err := WritePNG(filepath.Join(dir, fmt.Sprintf("panel_%d.png", n)), img); err != nil {
			t.Fatal(err)
		}
	}
}
