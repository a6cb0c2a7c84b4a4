package config

import (
	"os"
	"path/filepath"
	"testing"
)

// FuzzLoad checks that no input makes Load panic, and that every failure is
// reported as located *Error values.
func FuzzLoad(f *testing.F) {
	files, err := filepath.Glob("testdata/*.yml")
	if err != nil {
		f.Fatal(err)
	}
	for _, name := range files {
		data, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		c, err := Load(data, "fuzz.yml")
		if err != nil {
			if c != nil {
				t.Fatal("Load returned a configuration with an error")
			}
			errs := []error{err}
			if j, ok := err.(interface{ Unwrap() []error }); ok {
				errs = j.Unwrap()
			}
			for _, e := range errs {
				if _, ok := e.(*Error); !ok {
					t.Fatalf("not a *Error: %T %v", e, e)
				}
			}
			return
		}
		if c.Hash() == "" {
			t.Fatal("a loaded configuration has no hash")
		}
		if _, err := c.Policy(); err != nil {
			t.Fatalf("a loaded configuration has no policy: %v", err)
		}
	})
}
