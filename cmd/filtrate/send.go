package main

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/spf13/cobra"

	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
)

// readMessages reads HL7 v2 messages from files ("-" is standard input).
func readMessages(in io.Reader, files []string) ([][]byte, []string, error) {
	var msgs [][]byte
	var names []string
	for _, f := range files {
		var data []byte
		var err error
		if f == "-" {
			data, err = io.ReadAll(in)
		} else {
			data, err = os.ReadFile(f)
		}
		if err != nil {
			return nil, nil, fmt.Errorf("read %s: %w", f, err)
		}
		for _, m := range hl7v2.SplitMessages(data) {
			msgs = append(msgs, m)
			names = append(names, f)
		}
	}
	return msgs, names, nil
}

func newSendCmd() *cobra.Command {
	var opts struct {
		to                 string
		timeout            time.Duration
		caFile, cert, key  string
		serverName         string
		insecureSkipVerify bool
		tls                bool
	}
	cmd := &cobra.Command{
		Use:   "send --to HOST:PORT FILE...",
		Short: "Send HL7 v2 messages over MLLP and print each acknowledgement",
		Long: `Send HL7 v2 messages over MLLP, one at a time, for message-flow testing. A file
may hold several messages (each starts with an MSH segment; line ends \r, \n or
\r\n). "-" reads standard input. For each message it prints the file, the
message's control ID, the acknowledgement code and the acknowledged control ID,
and the error text of a negative acknowledgement. It exits non-zero if any
answer is not AA (or CA).`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, files []string) error {
			if opts.to == "" {
				return errors.New("--to HOST:PORT is required")
			}
			msgs, names, err := readMessages(cmd.InOrStdin(), files)
			if err != nil {
				return err
			}
			var tlsCfg *tls.Config
			if opts.tls || opts.caFile != "" || opts.cert != "" {
				tlsCfg, err = clientTLS(opts.caFile, opts.cert, opts.key, opts.serverName)
				if err != nil {
					return err
				}
			}
			client, err := mllp.Dial(cmd.Context(), opts.to, mllp.ClientOptions{TLSConfig: tlsCfg, AckTimeout: opts.timeout})
			if err != nil {
				return err
			}
			defer client.Close()
			out := cmd.OutOrStdout()
			failed := 0
			for i, m := range msgs {
				id := "?"
				if hm, err := hl7v2.ParseMSH(m); err == nil {
					id = hm.ControlID()
				}
				raw, err := client.Send(cmd.Context(), m)
				if err != nil {
					failed++
					fmt.Fprintf(out, "%s\t%s\tERROR\t%v\n", names[i], id, err)
					continue
				}
				ack, err := hl7v2.ParseACK(raw)
				if err != nil {
					failed++
					fmt.Fprintf(out, "%s\t%s\tERROR\tunreadable acknowledgement: %v\n", names[i], id, err)
					continue
				}
				line := fmt.Sprintf("%s\t%s\t%s\t%s", names[i], id, ack.Code, ack.ControlID)
				if !ack.Accepted() {
					failed++
					line += "\t" + ack.ErrorCode + " " + ack.Text
				}
				fmt.Fprintln(out, line)
			}
			fmt.Fprintf(out, "%d sent, %d not accepted\n", len(msgs), failed)
			if failed > 0 {
				return exitCode(2)
			}
			return nil
		},
	}
	f := cmd.Flags()
	f.StringVar(&opts.to, "to", "", "MLLP peer, HOST:PORT")
	f.DurationVar(&opts.timeout, "timeout", 30*time.Second, "wait for each acknowledgement")
	f.BoolVar(&opts.tls, "tls", false, "use TLS (with the system roots unless --ca is given)")
	f.StringVar(&opts.caFile, "ca", "", "CA certificate file (PEM) to verify the peer")
	f.StringVar(&opts.cert, "cert", "", "client certificate file (PEM)")
	f.StringVar(&opts.key, "key", "", "client key file (PEM)")
	f.StringVar(&opts.serverName, "server-name", "", "server name to verify (default: the host in --to)")
	return cmd
}

func clientTLS(caFile, certFile, keyFile, serverName string) (*tls.Config, error) {
	c := &tls.Config{MinVersion: tls.VersionTLS12, ServerName: serverName}
	if caFile != "" {
		pem, err := os.ReadFile(caFile)
		if err != nil {
			return nil, fmt.Errorf("--ca: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("--ca: no certificate found in %s", caFile)
		}
		c.RootCAs = pool
	}
	if certFile != "" || keyFile != "" {
		cert, err := tls.LoadX509KeyPair(certFile, keyFile)
		if err != nil {
			return nil, fmt.Errorf("--cert/--key: %w", err)
		}
		c.Certificates = []tls.Certificate{cert}
	}
	return c, nil
}
