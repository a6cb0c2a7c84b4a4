package app

import (
	"errors"
	"fmt"
	"net/http"
	"strconv"

	"filtrate/internal/audit"
	"filtrate/store"
)

// auditRoutes is the read-only audit view on the HTTP listener, behind the
// listener's authentication. It shows patient data (to authorised users
// only), like "filtrate audit show"; nothing here is ever logged.
//
//	GET /audit?patient=&message-id=&equation=&since=&until=&limit=
//	    JSON lines, one summary per record, newest first
//	GET /audit/{id}     one record as "audit show" prints it, with the
//	    recomputation verdict
//	GET /audit/export?format=csv|fhir&...filters
func (a *App) auditRoutes() []route {
	return []route{
		{pattern: "GET /audit", handler: http.HandlerFunc(a.auditSearch)},
		{pattern: "GET /audit/export", handler: http.HandlerFunc(a.auditExport)},
		{pattern: "GET /audit/{id}", handler: http.HandlerFunc(a.auditShow)},
	}
}

func (a *App) auditFilter(r *http.Request) (store.Filter, error) {
	q := r.URL.Query()
	f := store.Filter{PatientID: q.Get("patient"), MessageID: q.Get("message-id"), Equation: q.Get("equation")}
	loc, err := a.Config().Location()
	if err != nil {
		return f, err
	}
	if v := q.Get("since"); v != "" {
		if f.Since, err = audit.ParseTime(v, loc, false); err != nil {
			return f, fmt.Errorf("since: %w", err)
		}
	}
	if v := q.Get("until"); v != "" {
		if f.Until, err = audit.ParseTime(v, loc, true); err != nil {
			return f, fmt.Errorf("until: %w", err)
		}
	}
	if v := q.Get("limit"); v != "" {
		if f.Limit, err = strconv.Atoi(v); err != nil || f.Limit < 0 {
			return f, errors.New("limit: not a non-negative number")
		}
	}
	return f, nil
}

func (a *App) auditSearch(w http.ResponseWriter, r *http.Request) {
	f, err := a.auditFilter(r)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	recs, err := a.store.Search(r.Context(), f)
	if err != nil {
		http.Error(w, "audit store unavailable", http.StatusServiceUnavailable)
		return
	}
	w.Header().Set("Content-Type", "application/jsonl; charset=utf-8")
	sw := audit.NewSearchWriter(w, true)
	for _, rec := range recs {
		if err := sw.Write(rec); err != nil {
			return
		}
	}
	_ = sw.Close()
}

func (a *App) auditShow(w http.ResponseWriter, r *http.Request) {
	id, err := strconv.ParseInt(r.PathValue("id"), 10, 64)
	if err != nil {
		http.Error(w, "record ID must be a number", http.StatusBadRequest)
		return
	}
	rec, err := a.store.Record(r.Context(), id)
	switch {
	case errors.Is(err, store.ErrNotFound):
		http.Error(w, "no such audit record", http.StatusNotFound)
		return
	case err != nil:
		http.Error(w, "audit store unavailable", http.StatusServiceUnavailable)
		return
	}
	v, _ := audit.NewRecomputer(a.calc).Recompute(rec)
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	_ = audit.Render(w, rec, v)
}

func (a *App) auditExport(w http.ResponseWriter, r *http.Request) {
	f, err := a.auditFilter(r)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	switch r.URL.Query().Get("format") {
	case "", "csv":
		w.Header().Set("Content-Type", "text/csv; charset=utf-8")
		_, _ = audit.ExportCSV(r.Context(), w, a.store, f)
	case "fhir":
		w.Header().Set("Content-Type", "application/fhir+json")
		_, _ = audit.ExportFHIR(r.Context(), w, a.store, f, audit.FHIROptions{Calculator: a.calc})
	default:
		http.Error(w, "format must be csv or fhir", http.StatusBadRequest)
	}
}
