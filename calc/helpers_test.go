package calc_test

import (
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

// registered returns the current version of a built-in equation.
func registered(tb testing.TB, id string) calc.Equation {
	tb.Helper()
	e, ok := calc.Builtin().Latest(id)
	require.True(tb, ok, "%s is registered", id)
	return e
}
