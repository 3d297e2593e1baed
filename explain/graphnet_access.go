package explain

import "heedmap/engine"

// GraphOf returns the compiled graph behind a Network made by FromGraph,
// with the names of its image input and logits output, so an evaluator can
// drive the runtime directly (incremental occlusion). ok is false for any
// other Network and for channels-last models.
func GraphOf(net Network) (g *engine.Graph, input, output string, ok bool) {
	n, isGraph := net.(*graphNet)
	if !isGraph || n.nhwc {
		return nil, "", "", false
	}
	return n.g, n.input, n.output, true
}
