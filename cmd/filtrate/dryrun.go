package main

import (
	"bytes"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"filtrate/calc"
	"filtrate/config"
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
		Long: `Run HL7 v2 message files through exactly the code path of the daemon (parsing,
mapping, calibration, policy, equations, enrichment, acknowledgement) with a
temporary store that is deleted afterwards, and print for each message the
acknowledgement the sender would get and the message that would be forwarded.
Nothing is sent anywhere. A file may hold several messages; "-" reads standard
input. With --diff only added (+) and changed (~) segments are printed.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, files []string) error {
			cfg := config.Default()
			if opts.config != "" {
				var err error
				if cfg, err = config.LoadFile(opts.config); err != nil {
					return err
				}
			}
			msgs, names, err := readMessages(cmd.InOrStdin(), files)
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
			st.ForwardHL7 = true // show what would be forwarded even without a peer
			h := &ingest.HL7{Proc: pipeline.NewProcessor(c, s, version, nil), State: func() *ingest.State { return st }}
			out := cmd.OutOrStdout()
			notAA := 0
			for i, m := range msgs {
				p := h.Handle(cmd.Context(), m)
				ack, _ := hl7v2.ParseACK(p.Ack)
				fmt.Fprintf(out, "### %s  message %s  ACK %s", names[i], ack.ControlID, p.Code)
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
