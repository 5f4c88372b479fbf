package postgres

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"strings"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer"
)

// DBError is a server error reduced to what may be logged: the SQLSTATE
// code and the names of the constraint, table and column involved. The
// server's message and detail are dropped because they can echo values.
type DBError struct {
	Code       string // SQLSTATE, e.g. "23514"
	Constraint string
	Table      string
	Column     string
}

func (e *DBError) Error() string {
	var b strings.Builder
	fmt.Fprintf(&b, "postgres error %s", e.Code)
	if e.Constraint != "" {
		fmt.Fprintf(&b, " (constraint %s)", e.Constraint)
	} else if e.Table != "" {
		fmt.Fprintf(&b, " (table %s", e.Table)
		if e.Column != "" {
			fmt.Fprintf(&b, ", column %s", e.Column)
		}
		b.WriteString(")")
	}
	return b.String()
}

// transientCode reports the SQLSTATEs worth a retry of the same message:
// every error that the message's content cannot have caused. Only data
// exceptions (class 22), integrity constraint violations (23) and program
// limits (54, e.g. a row too large) come from the input; they are
// permanent and make a dead letter. Everything else is the server's state
// and passes: a failover's read-only transaction (25006) and shutdowns
// (57P01..57P03), connection exceptions (08), serialization failures
// (40001), deadlocks (40P01), lock and statement timeouts (55P03, 57014),
// too many connections or a full disk (53), a missing grant (42501) or
// table (42P01) while a migration or role is being fixed. A message whose
// store is broken must wait for it, not be lost to the dead-letter table.
func transientCode(code string) bool {
	switch code[:min(2, len(code))] {
	case "22", "23", "54":
		return false
	}
	return true
}

// translate turns a driver error into what callers of the store see; op
// names the operation ("ingest: claim inbox"). commitUnknown says the error
// came from COMMIT, whose outcome is then unknown unless the server said
// otherwise.
func translate(op string, err error, commitUnknown bool) error {
	if err == nil {
		return nil
	}
	if errors.Is(err, consumer.ErrDuplicate) || errors.Is(err, consumer.ErrTransient) {
		return err
	}
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) {
		dbErr := &DBError{Code: pgErr.Code, Constraint: pgErr.ConstraintName, Table: pgErr.TableName, Column: pgErr.ColumnName}
		if pgErr.Code == "55P03" { // lock_not_available: lock_timeout of the service role
			return fmt.Errorf("%s: %w: %w: %w", op, consumer.ErrTransient, consumer.ErrLocked, dbErr)
		}
		if transientCode(pgErr.Code) {
			return fmt.Errorf("%s: %w: %w", op, consumer.ErrTransient, dbErr)
		}
		return fmt.Errorf("%s: %w", op, dbErr)
	}
	var planErr *planError
	if errors.As(err, &planErr) {
		return fmt.Errorf("%s: %w", op, planErr.err)
	}
	if commitUnknown || isConnection(err) {
		// pgx #2110: a COMMIT that failed on the client side (deadline,
		// broken connection) may have committed. The inbox key absorbs the
		// retry.
		return fmt.Errorf("%s: %w: %w", op, consumer.ErrTransient, err)
	}
	return fmt.Errorf("%s: %w", op, err)
}

// isConnection reports errors of the connection rather than the statement.
func isConnection(err error) bool {
	var netErr net.Error
	var connErr *pgconn.ConnectError
	return errors.As(err, &netErr) || errors.As(err, &connErr) ||
		errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, pgconn.ErrConnClosed) ||
		errors.Is(err, context.DeadlineExceeded) || errors.Is(err, context.Canceled) ||
		pgconn.SafeToRetry(err) || pgconn.Timeout(err)
}

// planError carries an error of the caller's plan through the transaction
// unchanged (it is the caller's, not the database's).
type planError struct{ err error }

func (e *planError) Error() string { return e.err.Error() }
func (e *planError) Unwrap() error { return e.err }
