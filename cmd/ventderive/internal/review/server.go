package review

import (
	"crypto/sha256"
	"crypto/subtle"
	"embed"
	"errors"
	"io/fs"
	"log/slog"
	"net"
	"net/http"
	"net/netip"
	"time"
)

//go:embed templates/*.html static/*
var assets embed.FS

// Config is how the console is reached and who may read it. cmd fills it
// from flags and environment.
type Config struct {
	// Loopback is true when the listener is bound to loopback addresses
	// only. Then, and only then, the console may run without
	// authentication.
	Loopback bool
	// ProxyHeader names the request header a trusted reverse proxy sets
	// to the authenticated user (e.g. X-Forwarded-User). It is believed
	// only from TrustedProxies.
	ProxyHeader    string
	TrustedProxies []netip.Prefix
	// User and Password are the built-in credential (HTTP Basic), set by
	// the operator; empty Password disables it.
	User, Password string
	Log            *slog.Logger
	Now            func() time.Time
}

// ErrNoAuth is returned by New for a console bound beyond loopback without
// any way to authenticate its readers.
var ErrNoAuth = errors.New("the console is bound beyond loopback but no authentication is configured (set a trusted proxy header with its proxies, or a built-in credential)")

// Server is the console's HTTP handler.
type Server struct {
	store *Store
	cfg   Config
	log   *slog.Logger
	mux   *http.ServeMux
	pages *pageTemplates
	pass  [32]byte
}

// New returns the console over store. It refuses a configuration that
// would serve patient data beyond loopback without authentication.
func New(store *Store, cfg Config) (*Server, error) {
	if !cfg.Loopback && !cfg.authConfigured() {
		return nil, ErrNoAuth
	}
	if cfg.ProxyHeader != "" && len(cfg.TrustedProxies) == 0 {
		return nil, errors.New("a proxy header is believed only from trusted proxies: name them")
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.DiscardHandler)
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	t, err := parseTemplates()
	if err != nil {
		return nil, err
	}
	s := &Server{store: store, cfg: cfg, log: cfg.Log, mux: http.NewServeMux(), pages: t,
		pass: sha256.Sum256([]byte(cfg.Password))}
	s.routes()
	return s, nil
}

func (c Config) authConfigured() bool {
	return (c.ProxyHeader != "" && len(c.TrustedProxies) > 0) || c.Password != ""
}

func (s *Server) routes() {
	static, _ := fs.Sub(assets, "static")
	s.mux.Handle("GET /static/", http.StripPrefix("/static/", http.FileServerFS(static)))
	s.mux.HandleFunc("GET /{$}", func(w http.ResponseWriter, r *http.Request) {
		http.Redirect(w, r, "/patients", http.StatusSeeOther)
	})
	s.mux.HandleFunc("GET /patients", s.patients)
	s.mux.HandleFunc("GET /patients/{id}", s.patient)
	s.mux.HandleFunc("GET /patients/{id}/report", s.report)
	s.mux.HandleFunc("GET /values", s.value)
	s.mux.HandleFunc("GET /published", s.published)
	s.mux.HandleFunc("GET /settings", s.settings)
	s.mux.HandleFunc("GET /quality/refusals", s.refusals)
	s.mux.HandleFunc("GET /quality/deadletters", s.deadLetters)
	s.mux.HandleFunc("GET /quality/changes", s.changes)
	s.mux.HandleFunc("GET /quality/discrepancies", s.discrepancies)
}

// csp forbids every script (the console has none), inline styles, frames
// and foreign resources; plots are data: images.
const csp = "default-src 'none'; style-src 'self'; img-src 'self' data:; form-action 'self'; " +
	"frame-ancestors 'none'; base-uri 'none'"

// ServeHTTP sets the security headers, authenticates and logs the request
// by its route pattern only (never its path or query: they carry patient
// references).
func (s *Server) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	start := s.cfg.Now()
	h := w.Header()
	h.Set("Content-Security-Policy", csp)
	h.Set("X-Frame-Options", "DENY")
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("Referrer-Policy", "no-referrer")
	h.Set("Cross-Origin-Opener-Policy", "same-origin")
	h.Set("Cache-Control", "no-store")
	sw := &statusWriter{ResponseWriter: w, status: http.StatusOK}
	how, ok := s.authenticate(r)
	if !ok {
		if s.cfg.Password != "" {
			h.Set("WWW-Authenticate", `Basic realm="ventderive review", charset="UTF-8"`)
		}
		http.Error(sw, "authentication required", http.StatusUnauthorized)
	} else {
		s.mux.ServeHTTP(sw, r)
	}
	pattern := r.Pattern
	if pattern == "" {
		pattern = "(none)"
	}
	s.log.Info("request", "method", r.Method, "route", pattern, "status", sw.status, "auth", how,
		"ms", s.cfg.Now().Sub(start).Milliseconds())
}

// authenticate says how the request is authenticated ("proxy", "basic",
// "loopback") or false.
func (s *Server) authenticate(r *http.Request) (string, bool) {
	if s.cfg.ProxyHeader != "" && r.Header.Get(s.cfg.ProxyHeader) != "" && s.fromTrustedProxy(r) {
		return "proxy", true
	}
	if s.cfg.Password != "" {
		u, p, ok := r.BasicAuth()
		got := sha256.Sum256([]byte(p))
		if ok && subtle.ConstantTimeCompare([]byte(u), []byte(s.cfg.User)) == 1 &&
			subtle.ConstantTimeCompare(got[:], s.pass[:]) == 1 {
			return "basic", true
		}
	}
	if s.cfg.Loopback && !s.cfg.authConfigured() {
		return "loopback", true
	}
	return "none", false
}

func (s *Server) fromTrustedProxy(r *http.Request) bool {
	host, _, err := net.SplitHostPort(r.RemoteAddr)
	if err != nil {
		return false
	}
	a, err := netip.ParseAddr(host)
	if err != nil {
		return false
	}
	a = a.Unmap()
	for _, p := range s.cfg.TrustedProxies {
		if p.Contains(a) {
			return true
		}
	}
	return false
}

type statusWriter struct {
	http.ResponseWriter
	status int
}

func (w *statusWriter) WriteHeader(code int) {
	w.status = code
	w.ResponseWriter.WriteHeader(code)
}
