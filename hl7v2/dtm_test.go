package hl7v2

import (
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

func TestParseDTM(t *testing.T) {
	// Format: HL7 v2.5.1 chapter 2, section 2.A.22 (DTM),
	// YYYY[MM[DD[HH[MM[SS[.S[S[S[S]]]]]]]]][+/-ZZZZ].
	berlin, err := time.LoadLocation("Europe/Berlin")
	if err != nil {
		berlin = time.FixedZone("CET", 3600) // no tzdata on this machine
	}
	tests := []struct {
		in        string
		loc       *time.Location
		want      time.Time
		precision Precision
		offset    bool
	}{
		{"2025", nil, time.Date(2025, 1, 1, 0, 0, 0, 0, time.UTC), PrecisionYear, false},
		{"202503", nil, time.Date(2025, 3, 1, 0, 0, 0, 0, time.UTC), PrecisionMonth, false},
		{"20250314", nil, time.Date(2025, 3, 14, 0, 0, 0, 0, time.UTC), PrecisionDay, false},
		{"2025031408", nil, time.Date(2025, 3, 14, 8, 0, 0, 0, time.UTC), PrecisionHour, false},
		{"202503140815", nil, time.Date(2025, 3, 14, 8, 15, 0, 0, time.UTC), PrecisionMinute, false},
		{"20250314081530", nil, time.Date(2025, 3, 14, 8, 15, 30, 0, time.UTC), PrecisionSecond, false},
		{"20250314081530.1234", nil, time.Date(2025, 3, 14, 8, 15, 30, 123400000, time.UTC), PrecisionFraction, false},
		{"20250314081530.5", nil, time.Date(2025, 3, 14, 8, 15, 30, 500000000, time.UTC), PrecisionFraction, false},
		{"20250314081530+0100", nil, time.Date(2025, 3, 14, 7, 15, 30, 0, time.UTC), PrecisionSecond, true},
		{"202503140815-0530", nil, time.Date(2025, 3, 14, 13, 45, 0, 0, time.UTC), PrecisionMinute, true},
		{"20250314+0000", nil, time.Date(2025, 3, 14, 0, 0, 0, 0, time.UTC), PrecisionDay, true},
		{"20250314081500", berlin, time.Date(2025, 3, 14, 7, 15, 0, 0, time.UTC), PrecisionSecond, false},
		{"20240229", nil, time.Date(2024, 2, 29, 0, 0, 0, 0, time.UTC), PrecisionDay, false}, // leap day
	}
	for _, tt := range tests {
		t.Run(tt.in, func(t *testing.T) {
			got, err := ParseDTM(tt.in, tt.loc)
			require.NoError(t, err)
			require.True(t, tt.want.Equal(got.Time), "got %v want %v", got.Time, tt.want)
			require.Equal(t, tt.precision, got.Precision)
			require.Equal(t, tt.offset, got.HasOffset)
		})
	}

	z, err := ParseDTM("", nil)
	require.NoError(t, err)
	require.True(t, z.IsZero())

	for _, bad := range []string{
		"25", "20251", "2025031", "20251301", "20250230", "20230229", "20250314246000",
		"20250314086000", "20250314081560", "2025031408153", "20250314.5", "20250314081530.",
		"20250314081530.1234567890", "20250314+01", "20250314+2500", "20250314+0160",
		"2025-03-14", "2025031408x5", " 20250314", "20250314081530+0100Z",
	} {
		_, err := ParseDTM(bad, nil)
		require.ErrorIs(t, err, ErrDTM, bad)
	}
}

func TestFormatDTM(t *testing.T) {
	at := time.Date(2025, 3, 14, 9, 30, 5, 0, time.FixedZone("", 3600))
	require.Equal(t, "20250314093005+0100", FormatDTM(at))
	require.Equal(t, "20250314083005+0000", FormatDTM(at.UTC()))
}
