package onnx

// IsInitializer reports whether name is one of the graph's initializers. A
// graph input with that name is a parameter with a default value, not a
// value the caller must feed.
func (g *Graph) IsInitializer(name string) bool {
	_, ok := g.Initializers[name]
	return ok
}

// FeedInputs returns the graph inputs that are not initializers: the values
// a caller has to provide.
func (g *Graph) FeedInputs() []ValueInfo {
	var in []ValueInfo
	for _, v := range g.Inputs {
		if !g.IsInitializer(v.Name) {
			in = append(in, v)
		}
	}
	return in
}
