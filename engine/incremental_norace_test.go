//go:build !race

package engine

// incRace reports a -race build (see incremental_race_test.go).
const incRace = false
