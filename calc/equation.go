package calc

import (
	"errors"
	"fmt"
	"sort"
)

// Needs is the set of inputs an equation requires.
type Needs uint

// Input requirements.
const (
	NeedCreatinine Needs = 1 << iota
	NeedCystatinC
	NeedHeight
	NeedWeight
	NeedSex
	NeedTimedUrine // urine creatinine, urine volume and collection time
)

// Has reports whether all of o are in n.
func (n Needs) Has(o Needs) bool { return n&o == o }

// Inputs are the values an equation computes from, in canonical units:
// creatinine mg/dL, cystatin C mg/L, height cm, weight kg, urine creatinine
// mg/dL, urine volume mL, collection time min. Zero means absent.
type Inputs struct {
	AgeYears            float64
	Sex                 Sex
	CreatinineMgDL      float64
	CystatinCMgL        float64
	HeightCM            float64
	WeightKG            float64
	UrineCreatinineMgDL float64
	UrineVolumeML       float64
	CollectionMin       float64
}

// Equation is one published method at one implementation version.
//
// Version is stable: it changes only when the arithmetic of the
// implementation changes, and the previous version stays registered so that
// records made under it can be recomputed exactly.
type Equation struct {
	ID       string
	Version  string
	Name     string
	Citation string
	// LOINC is the default output code; empty when no equation-specific code
	// exists (the policy's generic code is used then).
	LOINC     string
	LOINCName string
	Unit      string // UnitIndexed or UnitNotIndexed
	// MinAge and MaxAge bound the validated age range in years, as
	// [MinAge, MaxAge); MaxAge 0 means no upper bound.
	MinAge, MaxAge float64
	Needs          Needs
	// Compute returns the unrounded value and every intermediate step. It is
	// only called with the inputs in Needs present and positive.
	Compute func(Inputs) (float64, []Step, error)
}

// Uses lists the measured analytes (creatinine, cystatin C) the equation
// computes from; transports use it to place the result beside its inputs.
func (e Equation) Uses() []Analyte {
	var a []Analyte
	if e.Needs.Has(NeedCreatinine) {
		a = append(a, Creatinine)
	}
	if e.Needs.Has(NeedCystatinC) {
		a = append(a, CystatinC)
	}
	if e.Needs.Has(NeedTimedUrine) {
		a = append(a, UrineCreatinine)
	}
	return a
}

// Inputs lists every analyte the equation computes from: those of Uses plus
// height, weight and the timed-urine volume and collection time when it
// needs them. A change to any of them (a corrected height, say) changes the
// result.
func (e Equation) Inputs() []Analyte {
	a := e.Uses()
	if e.Needs.Has(NeedHeight) {
		a = append(a, Height)
	}
	if e.Needs.Has(NeedWeight) {
		a = append(a, Weight)
	}
	if e.Needs.Has(NeedTimedUrine) {
		a = append(a, UrineVolume, CollectionTime)
	}
	return a
}

// Registry holds every equation version calc knows. It is immutable once
// built.
type Registry struct {
	byKey  map[string]Equation // id "@" version
	latest map[string]Equation
	ids    []string
}

// NewRegistry builds a registry. Versions of one ID are ordered as given: the
// last one listed is the latest.
func NewRegistry(eqs ...Equation) (*Registry, error) {
	r := &Registry{byKey: map[string]Equation{}, latest: map[string]Equation{}}
	for _, e := range eqs {
		if e.ID == "" || e.Version == "" || e.Compute == nil {
			return nil, fmt.Errorf("calc: equation %q version %q is incomplete", e.ID, e.Version)
		}
		key := e.ID + "@" + e.Version
		if _, dup := r.byKey[key]; dup {
			return nil, fmt.Errorf("calc: equation %s registered twice", key)
		}
		r.byKey[key] = e
		if _, seen := r.latest[e.ID]; !seen {
			r.ids = append(r.ids, e.ID)
		}
		r.latest[e.ID] = e
	}
	sort.Strings(r.ids)
	return r, nil
}

// Builtin returns a registry of every equation calc implements, including
// superseded versions.
func Builtin() *Registry {
	r, err := NewRegistry(builtinEquations()...)
	if err != nil {
		panic(err) // a programming error caught by the package tests
	}
	return r
}

// Latest returns the current version of an equation.
func (r *Registry) Latest(id string) (Equation, bool) {
	e, ok := r.latest[id]
	return e, ok
}

// Get returns one version of an equation.
func (r *Registry) Get(id, version string) (Equation, bool) {
	e, ok := r.byKey[id+"@"+version]
	return e, ok
}

// IDs returns the equation IDs in sorted order.
func (r *Registry) IDs() []string { return append([]string(nil), r.ids...) }

// errInput reports an input an equation cannot use.
var errInput = errors.New("calc: input out of the equation's domain")
