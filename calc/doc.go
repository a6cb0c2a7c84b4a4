// Package calc computes estimated and measured kidney function from laboratory
// results: the published eGFR equations, unit conversion, assay calibration and
// the laboratory's reporting policy.
//
// calc is pure. It performs no I/O, reads no clock and keeps no package-level
// mutable state: everything a calculation needs, including the collection time
// and the policy, arrives in a [Request], and everything it decided, including
// every intermediate arithmetic step and every refusal, leaves in an [Outcome].
// That is what lets an auditor recompute any stored result years later.
//
// eGFR is an estimate that assumes steady-state kidney function. Local
// laboratory policy and licensed clinicians decide how it is used.
package calc
