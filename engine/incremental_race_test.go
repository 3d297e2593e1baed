//go:build race

package engine

// incRace reports a -race build, whose sync.Pools drop items at random, so
// allocation counts say nothing about buffer reuse.
const incRace = true
