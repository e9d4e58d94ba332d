package sqlwire

import (
	"errors"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"github.com/sidetrend/sidetrend/sqlwire/wire"
)

// SQLSTATE codes the endpoint sends (Postgres' errcodes.txt).
const (
	codeSyntax              = "42601" // syntax_error
	codeFeatureNotSupported = "0A000" // feature_not_supported
	codeReadOnly            = "25006" // read_only_sql_transaction
	codeUndefinedTable      = "42P01" // undefined_table
	codeUndefinedObject     = "42704" // undefined_object (unknown parameter)
	codeInvalidParameter    = "22023" // invalid_parameter_value
	codeProtocolViolation   = "08P01" // protocol_violation
	codeInvalidPassword     = "28P01" // invalid_password
	codeInvalidAuth         = "28000" // invalid_authorization_specification
	codeUnknownDatabase     = "3D000" // invalid_catalog_name
	codeTooManyConnections  = "53300" // too_many_connections
	codeQueryCanceled       = "57014" // query_canceled
	codeAdminShutdown       = "57P01" // admin_shutdown
	codeInFailedTx          = "25P02" // in_failed_sql_transaction
	codeNoActiveTx          = "25P01" // no_active_sql_transaction
	codeActiveTx            = "25001" // active_sql_transaction
	codeInvalidCursor       = "34000" // invalid_cursor_name
	codeDuplicateCursor     = "42P03" // duplicate_cursor
	codeObjectState         = "55000" // object_not_in_prerequisite_state
	codeUnknownStatement    = "26000" // invalid_sql_statement_name
	codeDuplicateStatement  = "42P05" // duplicate_prepared_statement
	codeSavepoint           = "3B001" // invalid_savepoint_specification
	codeInternal            = "XX000" // internal_error
)

// sqlError is an error that goes to the client as an ErrorResponse with
// its SQLSTATE (wire.Error).
type sqlError = wire.Error

func errorf(code, format string, args ...any) *sqlError { return wire.Errorf(code, format, args...) }

func fatalf(code, format string, args ...any) *sqlError { return wire.Fatalf(code, format, args...) }

// notSupported is the 0A000 refusal of something the endpoint understands
// but will not run; what is named in the message.
func notSupported(format string, args ...any) *sqlError {
	return errorf(codeFeatureNotSupported, format, args...)
}

// asSQLError turns any error into one with a SQLSTATE: sqlErrors pass
// through, everything else is an internal error.
func asSQLError(err error) *sqlError {
	var se *sqlError
	if errors.As(err, &se) {
		return se
	}
	var te *livetables.Error
	if errors.As(err, &te) {
		return &sqlError{Code: te.Code, Severity: "ERROR", Message: te.Message, Hint: te.Hint}
	}
	return errorf(codeInternal, "%v", err)
}
