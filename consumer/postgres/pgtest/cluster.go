package pgtest

import (
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"os/user"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5"
)

// ErrNoServer reports that no PostgreSQL server binaries are installed.
var ErrNoServer = errors.New("no PostgreSQL server binaries found under /usr/lib/postgresql/*/bin or on PATH: install the Debian package postgresql")

// Cluster is a throwaway PostgreSQL server with its own data directory,
// started by StartCluster. Its superuser is "postgres", trusted on
// 127.0.0.1 and on its socket; it is meant for tests and demos only.
type Cluster struct {
	bin  string // directory of initdb and postgres
	dir  string // holds data/ and postgres.log
	sock string // unix socket directory (short path: socket paths are limited to ~107 bytes)
	port int
	cred *syscall.Credential // run as this user (postgres) when we are root

	mu     sync.Mutex
	cmd    *exec.Cmd
	exited chan struct{}
}

// ServerBin returns the directory holding the newest installed PostgreSQL
// server binaries, or ErrNoServer.
func ServerBin() (string, error) {
	dirs, _ := filepath.Glob("/usr/lib/postgresql/*/bin")
	slices.SortFunc(dirs, func(a, b string) int { return majorOf(b) - majorOf(a) })
	for _, d := range dirs {
		if isExec(filepath.Join(d, "initdb")) && isExec(filepath.Join(d, "postgres")) {
			return d, nil
		}
	}
	if p, err := exec.LookPath("initdb"); err == nil {
		d := filepath.Dir(p)
		if isExec(filepath.Join(d, "postgres")) {
			return d, nil
		}
	}
	return "", ErrNoServer
}

func majorOf(binDir string) int {
	n, _ := strconv.Atoi(filepath.Base(filepath.Dir(binDir)))
	return n
}

func isExec(p string) bool {
	st, err := os.Stat(p)
	return err == nil && !st.IsDir() && st.Mode()&0o111 != 0
}

// StartCluster creates a cluster in dir (created if missing; it must not hold
// another cluster) and starts it on a free port of 127.0.0.1. It fails with
// ErrNoServer when the server is not installed. Close it when done.
func StartCluster(ctx context.Context, dir string) (*Cluster, error) {
	bin, err := ServerBin()
	if err != nil {
		return nil, err
	}
	dir, err = filepath.Abs(dir)
	if err != nil {
		return nil, fmt.Errorf("cluster dir: %w", err)
	}
	c := &Cluster{bin: bin, dir: dir}
	if os.Geteuid() == 0 {
		u, err := user.Lookup("postgres")
		if err != nil {
			return nil, fmt.Errorf("running as root needs the postgres user (Debian package postgresql): %w", err)
		}
		uid, _ := strconv.Atoi(u.Uid)
		gid, _ := strconv.Atoi(u.Gid)
		c.cred = &syscall.Credential{Uid: uint32(uid), Gid: uint32(gid)}
	}
	if err := os.MkdirAll(filepath.Join(dir, "data"), 0o700); err != nil {
		return nil, fmt.Errorf("cluster dir: %w", err)
	}
	sock, err := os.MkdirTemp("", "vdpg")
	if err != nil {
		return nil, fmt.Errorf("socket dir: %w", err)
	}
	c.sock = sock
	if err := c.giveAway(); err != nil {
		c.removeFiles()
		return nil, err
	}
	if err := c.run(ctx, filepath.Join(bin, "initdb"), "-D", c.data(), "-U", "postgres", "-A", "trust",
		"-E", "UTF8", "--locale=C",
		// initdb's own writes are not fsynced (the cluster is throwaway);
		// the server itself runs with fsync on.
		"--no-sync"); err != nil {
		c.removeFiles()
		return nil, err
	}
	for attempt := 0; ; attempt++ {
		c.port, err = freePort()
		if err == nil {
			err = c.Start(ctx)
		}
		if err == nil {
			return c, nil
		}
		// Another process may have taken the port between our probe and
		// the server's bind: try another one.
		if attempt == 2 || ctx.Err() != nil {
			c.removeFiles()
			return nil, err
		}
	}
}

func (c *Cluster) data() string    { return filepath.Join(c.dir, "data") }
func (c *Cluster) logFile() string { return filepath.Join(c.dir, "postgres.log") }

// giveAway hands the cluster's files to the postgres user when we are root,
// and lets it reach them through temporary directories created 0700.
func (c *Cluster) giveAway() error {
	if c.cred == nil {
		return nil
	}
	uid, gid := int(c.cred.Uid), int(c.cred.Gid)
	for _, p := range []string{c.dir, c.data(), c.sock} {
		if err := os.Chown(p, uid, gid); err != nil {
			return fmt.Errorf("give %s to postgres: %w", p, err)
		}
	}
	f, err := os.OpenFile(c.logFile(), os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o600)
	if err != nil {
		return fmt.Errorf("log file: %w", err)
	}
	f.Close()
	if err := os.Chown(c.logFile(), uid, gid); err != nil {
		return fmt.Errorf("give log file to postgres: %w", err)
	}
	// Ancestors under the temporary directory (t.TempDir makes them 0700)
	// get search permission for others, nothing more.
	tmp := filepath.Clean(os.TempDir())
	for p := filepath.Dir(c.dir); strings.HasPrefix(p, tmp+string(filepath.Separator)); p = filepath.Dir(p) {
		st, err := os.Stat(p)
		if err != nil {
			return fmt.Errorf("cluster dir: %w", err)
		}
		if st.Mode().Perm()&0o001 == 0 {
			if err := os.Chmod(p, st.Mode().Perm()|0o001); err != nil {
				return fmt.Errorf("cluster dir: %w", err)
			}
		}
	}
	return nil
}

// run runs a server tool to completion as the cluster's user.
func (c *Cluster) run(ctx context.Context, name string, args ...string) error {
	cmd := exec.CommandContext(ctx, name, args...)
	cmd.Dir = c.dir
	cmd.Env = []string{"LC_ALL=C", "PATH=/usr/bin:/bin"}
	cmd.SysProcAttr = &syscall.SysProcAttr{Credential: c.cred}
	out, err := cmd.CombinedOutput()
	if err != nil {
		return fmt.Errorf("%s: %w: %s", filepath.Base(name), err, strings.TrimSpace(string(out)))
	}
	return nil
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// URL is the superuser URL of the cluster's "postgres" database over TCP.
func (c *Cluster) URL() string {
	return fmt.Sprintf("postgres://postgres@127.0.0.1:%d/postgres?sslmode=disable", c.port)
}

// Port is the TCP port the cluster listens on, the same across Stop and Start.
func (c *Cluster) Port() int { return c.port }

// Start starts the server of a stopped cluster (same port, same data) and
// waits until it accepts connections. Starting a running cluster is an error.
func (c *Cluster) Start(ctx context.Context) error {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cmd != nil {
		return errors.New("cluster already running")
	}
	logf, err := os.OpenFile(c.logFile(), os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o600)
	if err != nil {
		return fmt.Errorf("log file: %w", err)
	}
	cmd := exec.Command(filepath.Join(c.bin, "postgres"), "-D", c.data(),
		"-p", strconv.Itoa(c.port),
		"-k", c.sock,
		"-c", "listen_addresses=127.0.0.1",
		// Durability as in production, so that measurements mean something.
		"-c", "fsync=on",
		"-c", "synchronous_commit=on",
		"-c", "full_page_writes=on",
		"-c", "max_connections=100",
		"-c", "shared_buffers=64MB",
	)
	cmd.Dir = c.dir
	cmd.Env = []string{"LC_ALL=C", "PATH=/usr/bin:/bin"}
	cmd.Stdout, cmd.Stderr = logf, logf
	cmd.SysProcAttr = &syscall.SysProcAttr{
		Credential: c.cred,
		// If the test binary dies, the server shuts down (fast) instead of
		// living on. Go sets this after changing credentials, which would
		// otherwise clear it.
		Pdeathsig: syscall.SIGINT,
		Setpgid:   true, // a terminal's Ctrl-C goes to the test, which stops the server in order
	}
	if err := cmd.Start(); err != nil {
		logf.Close()
		return fmt.Errorf("start postgres: %w", err)
	}
	logf.Close()
	exited := make(chan struct{})
	go func() { cmd.Wait(); close(exited) }()
	c.cmd, c.exited = cmd, exited

	deadline := time.Now().Add(60 * time.Second)
	for {
		select {
		case <-exited:
			c.cmd = nil
			return fmt.Errorf("postgres exited at start: %s", c.logTail())
		default:
		}
		pctx, cancel := context.WithTimeout(ctx, time.Second)
		conn, err := pgx.Connect(pctx, c.URL())
		cancel()
		if err == nil {
			conn.Close(ctx)
			return nil
		}
		if ctx.Err() != nil || time.Now().After(deadline) {
			c.kill()
			return fmt.Errorf("postgres not ready: %w: %s", err, c.logTail())
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Stop stops the server: mode "fast" (roll back sessions, checkpoint, exit)
// or "immediate" (exit at once, as a crash would; recovery runs at the next
// Start). Stopping a stopped cluster does nothing.
func (c *Cluster) Stop(ctx context.Context, mode string) error {
	sig := syscall.SIGINT
	switch mode {
	case "fast":
	case "immediate":
		sig = syscall.SIGQUIT
	default:
		return fmt.Errorf("stop mode %q: want fast or immediate", mode)
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cmd == nil {
		return nil
	}
	_ = c.cmd.Process.Signal(sig)
	select {
	case <-c.exited:
		c.cmd = nil
		return nil
	case <-ctx.Done():
		return fmt.Errorf("stop postgres: %w", ctx.Err())
	}
}

// kill ends the postmaster at once and waits for it; the caller holds mu.
func (c *Cluster) kill() {
	if c.cmd == nil {
		return
	}
	_ = c.cmd.Process.Signal(syscall.SIGQUIT)
	<-c.exited
	c.cmd = nil
}

// Close stops the server (fast, then immediate after 30 s) and removes its
// files. It is safe to call more than once.
func (c *Cluster) Close() error {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	err := c.Stop(ctx, "fast")
	if err != nil {
		c.mu.Lock()
		c.kill()
		c.mu.Unlock()
	}
	c.removeFiles()
	return err
}

func (c *Cluster) removeFiles() {
	os.RemoveAll(c.data())
	os.Remove(c.logFile())
	if c.sock != "" {
		os.RemoveAll(c.sock)
	}
}

// logTail is the end of the server log, for error messages.
func (c *Cluster) logTail() string {
	b, _ := os.ReadFile(c.logFile())
	if len(b) > 2000 {
		b = b[len(b)-2000:]
	}
	return strings.TrimSpace(string(b))
}

// PrependHBA puts rules (pg_hba.conf lines) above the cluster's own
// authentication rules and restarts the server (same port, same data), so
// that every connection after it returns meets them. The cluster's own
// rules (trust on 127.0.0.1 and the socket) stay below: the superuser URL
// keeps working unless rules catch it first.
func (c *Cluster) PrependHBA(ctx context.Context, rules string) error {
	path := filepath.Join(c.data(), "pg_hba.conf")
	old, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("read pg_hba.conf: %w", err)
	}
	// Writing the existing file keeps its owner (the server's user).
	if err := os.WriteFile(path, []byte(strings.TrimRight(rules, "\n")+"\n\n"+string(old)), 0o600); err != nil {
		return fmt.Errorf("write pg_hba.conf: %w", err)
	}
	if err := c.Stop(ctx, "fast"); err != nil {
		return err
	}
	return c.Start(ctx)
}
