package calc

import "testing"

// Check table for ckd-epi-2021-cr (ckdepi2021cr.go).
//
// Reference implementations: kidney.epi 1.3.0 (Bikbov B, R package,
// egfr.ckdepi.cr.2021; its printed example is rounded to 2 decimals) and
// egfr (mhovd, R package, egfr_ckdepi_cr_2021; R prints 7 significant
// digits). Both implement Inker et al., N Engl J Med 2021;385:1737-49.
func TestCKDEPI2021Cr(t *testing.T) {
	runAdultChecks(t, ckdEPI2021Cr(), []adultCheck{
		{
			name:   "male 1.4 mg/dL 60 y",
			source: "kidney.epi 1.3.0 egfr.ckdepi.cr.2021 documented example, printed 57.54",
			in:     Inputs{AgeYears: 60, Sex: SexMale, CreatinineMgDL: 1.4},
			want:   57.54, tol: 0.005,
		},
		{
			name:   "female 1.0 mg/dL 50 y",
			source: "egfr (mhovd) egfr_ckdepi_cr_2021 documented example, printed 68.6335",
			in:     Inputs{AgeYears: 50, Sex: SexFemale, CreatinineMgDL: 1.0},
			want:   68.6335, tol: 1e-4,
		},
		{
			name:   "female 0.8 mg/dL 40 y",
			source: "egfr (mhovd) egfr_ckdepi_cr_2021 documented example, printed 95.46369",
			in:     Inputs{AgeYears: 40, Sex: SexFemale, CreatinineMgDL: 0.8},
			want:   95.46369, tol: 1e-4,
		},
		{
			name:   "male 1.2 mg/dL 65 y",
			source: "egfr (mhovd) egfr_ckdepi_cr_2021 documented example, printed 67.11141",
			in:     Inputs{AgeYears: 65, Sex: SexMale, CreatinineMgDL: 1.2},
			want:   67.11141, tol: 1e-4,
		},
		{
			// 142 × 1 × 1 × 0.9938^18 × 1.012 = 142 × 0.894091288 × 1.012
			name:   "female at the knot 0.7 mg/dL 18 y",
			source: "hand computation from the published formula (Inker 2021)",
			in:     Inputs{AgeYears: 18, Sex: SexFemale, CreatinineMgDL: 0.7},
			want:   128.4844945, tol: 1e-6,
		},
		{
			// 142 × 1 × (5.0/0.9)^−1.2 × 0.9938^75 = 142 × 0.127740028 × 0.627226546
			name:   "male 5.0 mg/dL 75 y",
			source: "hand computation from the published formula (Inker 2021)",
			in:     Inputs{AgeYears: 75, Sex: SexMale, CreatinineMgDL: 5.0},
			want:   11.37731497, tol: 1e-6,
		},
	})
}

func BenchmarkCKDEPI2021Cr(b *testing.B) {
	eq := ckdEPI2021Cr()
	in := Inputs{AgeYears: 60, Sex: SexMale, CreatinineMgDL: 1.4}
	b.ReportAllocs()
	for b.Loop() {
		_, _, _ = eq.Compute(in)
	}
}
