package calc

import "testing"

// Check table for ckd-epi-2021-crcys (ckdepi2021crcys.go).
//
// Reference implementations: kidney.epi 1.3.0 (Bikbov B, R package,
// egfr.ckdepi.cr_cys.2021; printed rounded to 2 decimals) and egfr (mhovd, R
// package, egfr_ckdepi_cr_cys_2021; R prints 7 significant digits). Both
// implement Inker et al., N Engl J Med 2021;385:1737-49.
func TestCKDEPI2021CrCys(t *testing.T) {
	runAdultChecks(t, ckdEPI2021CrCys(), []adultCheck{
		{
			name:   "male 1.4 mg/dL 0.8 mg/L 60 y",
			source: "kidney.epi 1.3.0 egfr.ckdepi.cr_cys.2021 documented example, printed 83.97",
			in:     Inputs{AgeYears: 60, Sex: SexMale, CreatinineMgDL: 1.4, CystatinCMgL: 0.8},
			want:   83.97, tol: 0.005,
		},
		{
			name:   "female 1.0 mg/dL 0.9 mg/L 50 y",
			source: "egfr (mhovd) egfr_ckdepi_cr_cys_2021 documented example, printed 80.3607",
			in:     Inputs{AgeYears: 50, Sex: SexFemale, CreatinineMgDL: 1.0, CystatinCMgL: 0.9},
			want:   80.3607, tol: 1e-4,
		},
		{
			// both "min" branches:
			// 135 × (0.5/0.7)^−0.219 × 1 × (0.6/0.8)^−0.323 × 1 × 0.9961^30 × 0.963
			// = 135 × 1.076470270 × 1.097375379 × 0.889381728 × 0.963
			name:   "female 0.5 mg/dL 0.6 mg/L 30 y",
			source: "hand computation from the published formula (Inker 2021)",
			in:     Inputs{AgeYears: 30, Sex: SexFemale, CreatinineMgDL: 0.5, CystatinCMgL: 0.6},
			want:   136.5857873, tol: 1e-6,
		},
		{
			// both "max" branches:
			// 135 × 1 × (2.0/0.9)^−0.544 × 1 × (1.6/0.8)^−0.778 × 0.9961^70
			// = 135 × 0.647660793 × 0.583174685 × 0.760686672
			name:   "male 2.0 mg/dL 1.6 mg/L 70 y",
			source: "hand computation from the published formula (Inker 2021)",
			in:     Inputs{AgeYears: 70, Sex: SexMale, CreatinineMgDL: 2.0, CystatinCMgL: 1.6},
			want:   38.78696928, tol: 1e-6,
		},
	})
}

func BenchmarkCKDEPI2021CrCys(b *testing.B) {
	eq := ckdEPI2021CrCys()
	in := Inputs{AgeYears: 60, Sex: SexMale, CreatinineMgDL: 1.4, CystatinCMgL: 0.8}
	b.ReportAllocs()
	for b.Loop() {
		_, _, _ = eq.Compute(in)
	}
}
