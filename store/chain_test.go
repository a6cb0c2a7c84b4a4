package store

import (
	"encoding/json"
	"reflect"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// goldenRecord is invented test data.
func goldenRecord() AuditRecord {
	exact := 72.125
	return AuditRecord{
		ID:              1,
		RecordedAt:      time.Date(2025, 1, 2, 4, 4, 5, 123456000, time.FixedZone("CET", 3600)),
		Transport:       "hl7v2",
		MessageID:       "MSG001",
		DedupKey:        "k001",
		RawHash:         "abc",
		PatientID:       "DEMO-P01",
		BirthDate:       "19700101",
		Sex:             "F",
		CollectedAt:     time.Date(2025, 1, 1, 23, 30, 0, 0, time.UTC),
		Inputs:          json.RawMessage(`{"cr":1}`),
		Equation:        "ckd-epi-2021-cr",
		EquationVersion: "1",
		Steps:           json.RawMessage(`[1,2.5]`),
		Exact:           &exact,
		Reported:        "72",
		Unit:            "mL/min/1.73m2",
		Category:        "G2",
		Comments:        []string{"a", "b=c"},
		Policy:          "demo",
		PolicyVersion:   "2",
		ConfigHash:      "cfg",
		SoftwareVersion: "0.1.0",
		OutputMessageID: "OUT001",
		Request:         json.RawMessage(`{}`),
		ContentHash:     "not covered",
		PrevHash:        GenesisHash,
	}
}

// TestCanonicalGolden pins the documented encoding. Source: the encoding
// written out by hand from the Canonical doc comment; the hash is from
// coreutils sha256sum over that literal text, independent of this package.
func TestCanonicalGolden(t *testing.T) {
	want := "filtrate-audit-v1\n" +
		"id=1:1\n" +
		"recorded_at=30:2025-01-02T03:04:05.123456000Z\n" +
		"transport=5:hl7v2\n" +
		"message_id=6:MSG001\n" +
		"dedup_key=4:k001\n" +
		"raw_hash=3:abc\n" +
		"patient_id=8:DEMO-P01\n" +
		"birth_date=8:19700101\n" +
		"sex=1:F\n" +
		"collected_at=30:2025-01-01T23:30:00.000000000Z\n" +
		"inputs=8:{\"cr\":1}\n" +
		"equation=15:ckd-epi-2021-cr\n" +
		"equation_version=1:1\n" +
		"steps=7:[1,2.5]\n" +
		"exact=6:72.125\n" +
		"reported=2:72\n" +
		"unit=13:mL/min/1.73m2\n" +
		"category=2:G2\n" +
		"comments=11:[\"a\",\"b=c\"]\n" +
		"suppression_code=0:\n" +
		"suppression_text=0:\n" +
		"policy=4:demo\n" +
		"policy_version=1:2\n" +
		"config_hash=3:cfg\n" +
		"software_version=5:0.1.0\n" +
		"output_message_id=6:OUT001\n" +
		"request=2:{}\n" +
		"prev_hash=64:" + GenesisHash + "\n"
	r := goldenRecord()
	require.Equal(t, want, string(Canonical(r)))
	// printf '<the text above>' | sha256sum
	require.Equal(t, "4ee47b7f73ee689ba87e3f7cfc944209c0542a2de635bebb7e1f700b8358a987", HashRecord(r))
}

// TestCanonicalCoversEveryField changes each field in turn: every field but
// ContentHash must change the hash. A field added to AuditRecord without
// being added to Canonical fails here.
func TestCanonicalCoversEveryField(t *testing.T) {
	base := goldenRecord()
	baseHash := HashRecord(base)
	typ := reflect.TypeOf(base)
	for i := range typ.NumField() {
		f := typ.Field(i)
		t.Run(f.Name, func(t *testing.T) {
			r := goldenRecord()
			v := reflect.ValueOf(&r).Elem().Field(i)
			switch x := v.Addr().Interface().(type) {
			case *int64:
				*x++
			case *string:
				*x += "x"
			case *time.Time:
				*x = x.Add(time.Microsecond)
			case *json.RawMessage:
				*x = json.RawMessage(`{"changed":true}`)
			case **float64:
				changed := **x + 0.001
				*x = &changed
			case *[]string:
				*x = append(*x, "extra")
			default:
				t.Fatalf("field %s of type %s: teach this test to change it", f.Name, f.Type)
			}
			if f.Name == "ContentHash" {
				require.Equal(t, baseHash, HashRecord(r))
				return
			}
			require.NotEqual(t, baseHash, HashRecord(r))
		})
	}
}

func TestCanonicalEquivalences(t *testing.T) {
	tests := []struct {
		name   string
		mutate func(*AuditRecord)
		same   bool
	}{
		{"time zone does not matter", func(r *AuditRecord) { r.RecordedAt = r.RecordedAt.UTC() }, true},
		{"nil and empty comments agree", func(r *AuditRecord) { r.Comments = nil }, false},
		{"value moved between neighbouring fields", func(r *AuditRecord) { r.BirthDate += r.Sex; r.Sex = "" }, false},
		{"nil exact differs from zero", func(r *AuditRecord) { r.Exact = nil }, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := goldenRecord()
			tc.mutate(&r)
			require.Equal(t, tc.same, HashRecord(r) == HashRecord(goldenRecord()))
		})
	}
	a, b := goldenRecord(), goldenRecord()
	a.Comments, b.Comments = nil, []string{}
	require.Equal(t, HashRecord(a), HashRecord(b), "nil and empty comments hash alike")
	zero := 0.0
	a.Exact = &zero
	b.Exact = nil
	require.NotEqual(t, HashRecord(a), HashRecord(b))
}

// chain builds an intact chain of n invented records.
func chain(n int) []AuditRecord {
	out := make([]AuditRecord, n)
	prev := GenesisHash
	for i := range out {
		r := goldenRecord()
		r.ID = int64(i + 1)
		r.MessageID = "MSG" + string(rune('A'+i))
		r.PrevHash = prev
		r.ContentHash = HashRecord(r)
		prev = r.ContentHash
		out[i] = r
	}
	return out
}

func TestVerifyChain(t *testing.T) {
	tests := []struct {
		name   string
		mutate func([]AuditRecord) []AuditRecord
		want   []Problem
	}{
		{"intact", func(c []AuditRecord) []AuditRecord { return c }, nil},
		{"empty", func([]AuditRecord) []AuditRecord { return nil }, nil},
		{"altered content", func(c []AuditRecord) []AuditRecord {
			c[2].Reported = "99"
			return c
		}, []Problem{{ProblemContentHash, 3, 3}}},
		{"altered and rehashed", func(c []AuditRecord) []AuditRecord {
			c[2].Reported = "99"
			c[2].ContentHash = HashRecord(c[2])
			return c
		}, []Problem{{ProblemBrokenLink, 4, 4}}},
		{"first record not linked to genesis", func(c []AuditRecord) []AuditRecord {
			c[0].PrevHash = c[1].ContentHash
			c[0].ContentHash = HashRecord(c[0])
			return c
		}, []Problem{{ProblemBrokenLink, 1, 1}, {ProblemBrokenLink, 2, 2}}},
		{"one removed", func(c []AuditRecord) []AuditRecord {
			return append(c[:3], c[4:]...)
		}, []Problem{{ProblemGap, 4, 4}}},
		{"several removed", func(c []AuditRecord) []AuditRecord {
			return append(c[:1], c[4:]...)
		}, []Problem{{ProblemGap, 2, 4}}},
		{"first removed", func(c []AuditRecord) []AuditRecord { return c[1:] }, []Problem{{ProblemGap, 1, 1}}},
		{"repeated", func(c []AuditRecord) []AuditRecord {
			return append(c[:3], c[2:]...)
		}, []Problem{{ProblemOrder, 3, 3}}},
		{"swapped", func(c []AuditRecord) []AuditRecord {
			c[1], c[2] = c[2], c[1]
			return c
		}, []Problem{{ProblemGap, 2, 2}, {ProblemOrder, 2, 2}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			require.Equal(t, tc.want, VerifyChain(tc.mutate(chain(6))))
		})
	}
}

func TestVerifierHead(t *testing.T) {
	c := chain(5)
	feed := func(recs []AuditRecord, h ChainHead) []Problem {
		v := NewVerifier()
		for _, r := range recs {
			v.Add(r)
		}
		v.CheckHead(h)
		return v.Problems()
	}
	head := ChainHead{LastID: 5, LastHash: c[4].ContentHash}
	require.Empty(t, feed(c, head))
	require.Equal(t, []Problem{{ProblemHead, 4, 5}}, feed(c[:3], head), "tail removed")
	require.Equal(t, []Problem{{ProblemHead, 5, 5}}, feed(c, ChainHead{LastID: 5, LastHash: GenesisHash}), "head hash differs")
	require.Equal(t, []Problem{{ProblemHead, 4, 4}}, feed(c, ChainHead{LastID: 4, LastHash: c[3].ContentHash}), "records beyond head")
	require.Empty(t, feed(nil, ChainHead{LastHash: GenesisHash}), "empty chain")

	v := ResumeVerifier(c[1].ID, c[1].ContentHash)
	for _, r := range c[2:] {
		require.Zero(t, v.Add(r))
	}
	require.True(t, v.OK())
	require.EqualValues(t, 3, v.Checked())
	require.Equal(t, "records 4-5: head-mismatch", Problem{ProblemHead, 4, 5}.String())
	require.Equal(t, "record 3: content-hash-mismatch", Problem{ProblemContentHash, 3, 3}.String())
}
