// Package review is the reviewer console: a read-only web console over the
// provenance store, for quality reviewers and clinical decision-support
// staff who would rather look than read tables.
//
// It reads only the review_* views (as the ventderive_reviewer role, in
// read-only transactions), through postgres.Reviewer where the audit
// already answers the question and through the queries in store.go where it
// does not. Pages are server-rendered with html/template; plots are SVG
// drawn by gonum.org/v1/plot on the server, each point made clickable by an
// HTML image map (no script at all, so the Content-Security-Policy forbids
// every script). Every asset is embedded: the console works offline.
//
// Values are advisory, never orders: every page carries a banner saying so,
// and every value links to its full basis.
package review
