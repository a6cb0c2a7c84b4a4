package calc

// builtinEquations lists every implemented equation version. Superseded
// versions stay listed before the current one so that old audit records can
// be recomputed exactly; see each file for its citation and check table.
func builtinEquations() []Equation {
	return []Equation{
		ckdEPI2021Cr(),
		ckdEPI2021CrCys(),
		ckdEPI2012Cys(),
		ckdEPI2009Cr(),
		mdrd175(),
		ekfcCr(),
		ekfcCys(),
		ekfcCrCys(),
		ckidU25Cr(),
		ckidU25Cys(),
		ckidU25CrCys(),
		schwartzBedside(),
		cockcroftGault(),
		crclTimedUrine(),
	}
}
