package wire

import (
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5/pgproto3"
)

// SQLSTATE codes the protocol side sends (Postgres' errcodes.txt).
const (
	codeSyntax              = "42601" // syntax_error
	codeFeatureNotSupported = "0A000" // feature_not_supported
	codeProtocolViolation   = "08P01" // protocol_violation
	codeInvalidPassword     = "28P01" // invalid_password
	codeInvalidAuth         = "28000" // invalid_authorization_specification
	codeUnknownDatabase     = "3D000" // invalid_catalog_name
	codeTooManyConnections  = "53300" // too_many_connections
	codeProgramLimit        = "54000" // program_limit_exceeded
	codeAdminShutdown       = "57P01" // admin_shutdown
	codeInternal            = "XX000" // internal_error
)

// Error is an error that goes to the client as an ErrorResponse with its
// SQLSTATE. Message says what went wrong, Hint what to change.
type Error struct {
	Code     string
	Severity string // ERROR unless FATAL
	Message  string
	Detail   string
	Hint     string
	Position int // 1-based character position in the statement, 0 if none
}

func (e *Error) Error() string {
	s := e.Message
	if e.Hint != "" {
		s += " (" + e.Hint + ")"
	}
	return s
}

// Errorf is an ERROR with SQLSTATE code.
func Errorf(code, format string, args ...any) *Error {
	return &Error{Code: code, Severity: "ERROR", Message: fmt.Sprintf(format, args...)}
}

// Fatalf is a FATAL error with SQLSTATE code: the session ends once it is
// sent.
func Fatalf(code, format string, args ...any) *Error {
	e := Errorf(code, format, args...)
	e.Severity = "FATAL"
	return e
}

// WithHint sets the hint and returns e.
func (e *Error) WithHint(format string, args ...any) *Error {
	e.Hint = fmt.Sprintf(format, args...)
	return e
}

// AsError turns any error into one with a SQLSTATE: an *Error passes
// through, everything else is an internal error.
func AsError(err error) *Error {
	var se *Error
	if errors.As(err, &se) {
		return se
	}
	return Errorf(codeInternal, "%v", err)
}

// ErrShutdown is the cause of the server's context once Stop was called.
var ErrShutdown = errors.New("the sidetrend endpoint is shutting down")

// ErrCancelRequest is the cause Session.Cancel gets for a client's
// CancelRequest.
var ErrCancelRequest = errors.New("cancel request")

// ErrClientGone is the cause WatchClient cancels with when the client
// disconnected.
var ErrClientGone = errors.New("the client disconnected")

func errorResponse(e *Error) *pgproto3.ErrorResponse {
	sev := e.Severity
	if sev == "" {
		sev = "ERROR"
	}
	return &pgproto3.ErrorResponse{Severity: sev, SeverityUnlocalized: sev, Code: e.Code,
		Message: e.Message, Detail: e.Detail, Hint: e.Hint, Position: int32(e.Position)}
}
