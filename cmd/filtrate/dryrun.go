package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"filtrate/calc"
	"filtrate/config"
	"filtrate/fhir"
	"filtrate/hl7v2"
	"filtrate/internal/ingest"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

func newDryrunCmd(version string) *cobra.Command {
	var opts struct {
		config string
		diff   bool
	}
	cmd := &cobra.Command{
		Use:   "dryrun [--config FILE] [--diff] FILE...",
		Short: "Run message files through the pipeline offline and print what would be sent",
		Long: `Run HL7 v2 message files and FHIR JSON requests through exactly the code path
of the daemon (parsing, mapping, calibration, policy, equations, enrichment,
acknowledgement) with a temporary store that is deleted afterwards, and print
for each message the answer the sender would get and what would be forwarded.
Nothing is sent anywhere. An HL7 v2 file may hold several messages; a file
starting with '{' is one FHIR request (a Bundle, or one Observation); "-" reads
standard input. With --diff only added (+) and changed (~) HL7 v2 segments are
printed, and for FHIR the answer (computed resources and issues) instead of the
forwarded transaction.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, files []string) error {
			cfg := config.Default()
			if opts.config != "" {
				var err error
				if cfg, err = config.LoadFile(opts.config); err != nil {
					return err
				}
			}
			inputs, err := readInputs(cmd.InOrStdin(), files)
			if err != nil {
				return err
			}
			dir, err := os.MkdirTemp("", "filtrate-dryrun-")
			if err != nil {
				return err
			}
			defer os.RemoveAll(dir)
			s, err := store.Open(cmd.Context(), "file:"+filepath.Join(dir, "dryrun.db"), store.WithSoftwareVersion(version))
			if err != nil {
				return err
			}
			defer s.Close()
			c := calc.NewCalculator(calc.Builtin())
			st, err := ingest.StateFromConfig(cfg, c.Registry())
			if err != nil {
				return err
			}
			// Show what would be forwarded even without a configured peer.
			st.ForwardHL7, st.ForwardFHIR = true, true
			proc := pipeline.NewProcessor(c, s, version, nil)
			h := &ingest.HL7{Proc: proc, State: func() *ingest.State { return st }, History: s, Sent: s}
			codec, err := fhir.NewCodec()
			if err != nil {
				return err
			}
			fh := &ingest.FHIR{Proc: proc, State: func() *ingest.State { return st }, Codec: codec, Version: version, Site: cfg.Site, History: s, Sent: s}
			out := cmd.OutOrStdout()
			notAA := 0
			for _, in := range inputs {
				if in.fhir {
					p := fh.Handle(cmd.Context(), in.endpoint, in.data)
					fmt.Fprintf(out, "### %s  FHIR  HTTP %d", in.name, p.Status)
					if p.Code != hl7v2.AckAccept {
						notAA++
					} else if p.Duplicate {
						fmt.Fprint(out, "  (duplicate: would not be forwarded again)")
					}
					fmt.Fprintln(out)
					body := p.Forwarded
					if opts.diff || body == nil {
						body = p.Body // the answer: computed resources and issues
					}
					writeJSON(out, body)
					continue
				}
				m := in.data
				p := h.Handle(cmd.Context(), m)
				ack, _ := hl7v2.ParseACK(p.Ack)
				fmt.Fprintf(out, "### %s  message %s  ACK %s", in.name, ack.ControlID, p.Code)
				if p.Code != hl7v2.AckAccept {
					notAA++
					fmt.Fprintf(out, "  %s %s", ack.ErrorCode, ack.Text)
				} else if p.Duplicate {
					fmt.Fprint(out, "  (duplicate: would not be forwarded again)")
				}
				fmt.Fprintln(out)
				if p.Enriched == nil {
					continue
				}
				if opts.diff {
					writeDiff(out, m, p.Enriched)
				} else {
					out.Write(bytes.ReplaceAll(p.Enriched, []byte("\r"), []byte("\n")))
				}
				fmt.Fprintln(out)
			}
			if notAA > 0 {
				return exitCode(2)
			}
			return nil
		},
	}
	cmd.Flags().StringVar(&opts.config, "config", "", "configuration file (YAML); default: built-in")
	cmd.Flags().BoolVar(&opts.diff, "diff", false, "print only added (+) and changed (~) segments")
	return cmd
}

// writeDiff prints the segments of enriched that are not in orig: inserted
// ones with "+", and ones that differ only from their original counterpart
// (renumbered set IDs) with "~". Enrichment only inserts segments and
// renumbers, so a forward walk suffices.
func writeDiff(w io.Writer, orig, enriched []byte) {
	o := segments(orig)
	j := 0
	for _, seg := range segments(enriched) {
		switch {
		case j < len(o) && seg == o[j]:
			j++
		case j < len(o) && sameSegmentType(seg, o[j]) && !strings.HasPrefix(seg, "NTE") && renumbered(seg, o[j]):
			fmt.Fprintln(w, "~ "+seg)
			j++
		default:
			fmt.Fprintln(w, "+ "+seg)
		}
	}
}

func segments(b []byte) []string {
	var out []string
	for _, s := range strings.Split(strings.ReplaceAll(string(b), "\n", "\r"), "\r") {
		if s != "" {
			out = append(out, s)
		}
	}
	return out
}

func sameSegmentType(a, b string) bool {
	return len(a) >= 3 && len(b) >= 3 && a[:3] == b[:3]
}

// renumbered reports whether a and b differ only in field 1 (the set ID).
func renumbered(a, b string) bool {
	fa, fb := strings.SplitN(a, "|", 3), strings.SplitN(b, "|", 3)
	return len(fa) == 3 && len(fb) == 3 && fa[2] == fb[2]
}

// input is one message to dry-run: an HL7 v2 message, or a FHIR request.
type input struct {
	name     string
	data     []byte
	fhir     bool
	endpoint fhir.Endpoint
}

// readInputs reads the files ("-" is standard input). A file whose first
// non-blank byte is '{' is one FHIR request (a Bundle, or an Observation as
// posted to [base]/Observation); any other file holds HL7 v2 messages.
func readInputs(stdin io.Reader, files []string) ([]input, error) {
	var out []input
	for _, f := range files {
		var data []byte
		var err error
		if f == "-" {
			data, err = io.ReadAll(stdin)
		} else {
			data, err = os.ReadFile(f)
		}
		if err != nil {
			return nil, fmt.Errorf("read %s: %w", f, err)
		}
		if t := bytes.TrimSpace(data); len(t) > 0 && t[0] == '{' {
			var head struct {
				ResourceType string `json:"resourceType"`
			}
			_ = json.Unmarshal(t, &head) // a broken request is refused by the handler, with its reason
			ep := fhir.EndpointBundle
			if head.ResourceType == "Observation" {
				ep = fhir.EndpointObservation
			}
			out = append(out, input{name: f, data: data, fhir: true, endpoint: ep})
			continue
		}
		for _, m := range hl7v2.SplitMessages(data) {
			out = append(out, input{name: f, data: m})
		}
	}
	return out, nil
}

// writeJSON prints JSON indented for reading.
func writeJSON(w io.Writer, b []byte) {
	var buf bytes.Buffer
	if err := json.Indent(&buf, b, "", "  "); err != nil {
		w.Write(b)
	} else {
		w.Write(buf.Bytes())
	}
	fmt.Fprintln(w)
}
