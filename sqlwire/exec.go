package sqlwire

import (
	"context"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"sort"
	"strconv"
	"strings"

	"github.com/jackc/pgx/v5/pgproto3"
	"github.com/jackc/pgx/v5/pgtype"
)

// SimpleQuery runs a simple-protocol Query: each statement in turn until
// one fails; the protocol side then sends ReadyForQuery.
func (sess *session) SimpleQuery(sql string) error {
	sess.w.Log().Debug("sql endpoint query", "sql", sql)
	delete(sess.prepared, "")
	delete(sess.portals, "")
	stmts, err := parseStatements(sql)
	if err != nil {
		return wireError(err)
	}
	defer sess.endImplicit()
	for _, st := range stmts {
		if _, ok := st.(*emptyStmt); ok {
			sess.w.Send(&pgproto3.EmptyQueryResponse{})
			continue
		}
		if err := sess.run(st, nil, nil, 0); err != nil {
			return wireError(err)
		}
	}
	return nil
}

// allowedWhenFailed reports whether st may run in a failed transaction
// block: only the statements that end it or roll back to a savepoint.
func allowedWhenFailed(st stmt) bool {
	t, ok := st.(*txStmt)
	return ok && (t.kind == txCommit || t.kind == txRollback || t.kind == txRollbackTo)
}

func (sess *session) checkFailed(st stmt) error {
	if sess.tx == txFailed && !allowedWhenFailed(st) {
		return errorf(codeInFailedTx, "current transaction is aborted, commands ignored until end of transaction block").
			WithHint("send ROLLBACK, or ROLLBACK TO SAVEPOINT")
	}
	return nil
}

// run executes one statement and sends its results. In the simple
// protocol (p == nil) row-returning statements send RowDescription first;
// for a portal, Describe does that and Execute's maxRows applies.
func (sess *session) run(st stmt, params []paramVal, p *portal, maxRows uint32) error {
	if err := sess.checkFailed(st); err != nil {
		return err
	}
	switch st := st.(type) {
	case *selectStmt:
		return sess.runSelect(st, params, p, maxRows)
	case *declareStmt:
		return sess.declare(st, params)
	case *fetchStmt:
		return sess.fetch(st, p == nil)
	case *closeStmt:
		if st.all {
			sess.cursors = map[string]*cursor{}
		} else {
			if _, ok := sess.cursors[st.name]; !ok {
				return errorf(codeInvalidCursor, "cursor %q does not exist", st.name)
			}
			delete(sess.cursors, st.name)
		}
		return sess.complete("CLOSE CURSOR")
	case *txStmt:
		return sess.transaction(st)
	case *setStmt:
		return sess.setting(st)
	case *showStmt:
		return sess.show(st, p == nil)
	case *deallocateStmt:
		if st.all {
			for name := range sess.prepared {
				if name != "" {
					delete(sess.prepared, name)
				}
			}
			return sess.complete("DEALLOCATE ALL")
		}
		if _, ok := sess.prepared[st.name]; !ok || st.name == "" {
			return errorf(codeUnknownStatement, "prepared statement %q does not exist", st.name)
		}
		delete(sess.prepared, st.name)
		return sess.complete("DEALLOCATE")
	case *discardStmt:
		if sess.tx != txIdle {
			return errorf(codeActiveTx, "DISCARD ALL cannot run inside a transaction block")
		}
		sess.cursors = map[string]*cursor{}
		for name := range sess.prepared {
			if name != "" {
				delete(sess.prepared, name)
			}
		}
		sess.set.resetAll()
		return sess.complete("DISCARD ALL")
	case *emptyStmt:
		sess.w.Send(&pgproto3.EmptyQueryResponse{})
		return nil
	}
	return errorf(codeInternal, "statement %T has no executor", st)
}

func (sess *session) complete(tag string) error {
	sess.w.Send(&pgproto3.CommandComplete{CommandTag: []byte(tag)})
	return nil
}

// textFields describes text columns, for SHOW.
func textFields(names ...string) []pgproto3.FieldDescription {
	out := make([]pgproto3.FieldDescription, len(names))
	for i, n := range names {
		out[i] = pgproto3.FieldDescription{Name: []byte(n), DataTypeOID: pgtype.TextOID, DataTypeSize: -1, TypeModifier: -1}
	}
	return out
}

// sendRows sends up to limit rows (0: all) of res from *pos on and
// reports how many and whether the result ended.
func (sess *session) sendRows(res *result, pos *int, limit int64, send bool) (n int64, done bool, err error) {
	for limit <= 0 || n < limit {
		if *pos >= len(res.rows) {
			return n, true, nil
		}
		if send {
			sess.w.Send(&pgproto3.DataRow{Values: res.rows[*pos]})
		}
		*pos++
		n++
		if send && n%flushEvery == 0 {
			if err := sess.w.Flush(); err != nil {
				return n, false, err
			}
		}
	}
	return n, *pos >= len(res.rows), nil
}

// query computes what q needs and has Postgres evaluate it.
func (sess *session) query(ctx context.Context, q *selectStmt, params []paramVal) (*result, error) {
	lim := &sess.srv.cfg.Limits
	b := newBudget(lim)
	doms, err := newPushdown(q, params, lim).domains(ctx, sess.srv.ev, sess.set)
	if err != nil {
		return nil, canceledOr(ctx, err)
	}
	rows := make([]*livetables.Rows, len(q.rels))
	for i, r := range q.rels {
		if rows[i], err = r.table.Scan(ctx, sess.srv.src, doms[r], r.used, b); err != nil {
			return nil, canceledOr(ctx, err)
		}
	}
	res, err := sess.srv.ev.run(ctx, q, params, rows, sess.set, b)
	if err != nil {
		return nil, canceledOr(ctx, err)
	}
	return res, nil
}

func (sess *session) runSelect(st *selectStmt, params []paramVal, p *portal, maxRows uint32) error {
	if p == nil {
		ctx, end := sess.beginStatement()
		defer end()
		res, err := sess.query(ctx, st, params)
		if err != nil {
			return err
		}
		sess.w.Send(&pgproto3.RowDescription{Fields: res.fields})
		pos := 0
		n, _, err := sess.sendRows(res, &pos, 0, true)
		if err != nil {
			return err
		}
		return sess.complete("SELECT " + strconv.FormatInt(n, 10))
	}
	if err := sess.portalResult(p); err != nil {
		return err
	}
	n, done, err := sess.sendRows(p.res, &p.pos, int64(maxRows), true)
	if err != nil {
		return err
	}
	p.sent += n
	if !done {
		sess.w.Send(&pgproto3.PortalSuspended{})
		return nil
	}
	return sess.complete("SELECT " + strconv.FormatInt(p.sent, 10))
}

// portalResult runs a SELECT portal's query once, at its first Describe
// or Execute.
func (sess *session) portalResult(p *portal) error {
	if p.res != nil {
		return nil
	}
	ctx, end := sess.beginStatement()
	defer end()
	res, err := sess.query(ctx, p.prep.st.(*selectStmt), p.params)
	if err != nil {
		return err
	}
	p.res = res
	return nil
}

// canceledOr turns the error of a statement whose context ended into the
// cancellation error, whatever the failing step made of it.
func canceledOr(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		if se := asSQLError(err); se.Code == codeQueryCanceled || se.Code == codeAdminShutdown {
			return se
		}
		return statementCanceled(ctx)
	}
	return err
}

func (sess *session) declare(st *declareStmt, params []paramVal) error {
	if sess.tx == txIdle {
		return errorf(codeNoActiveTx, "DECLARE CURSOR can only be used in transaction blocks").
			WithHint("start a transaction with BEGIN first")
	}
	if _, ok := sess.cursors[st.name]; ok {
		return errorf(codeDuplicateCursor, "cursor %q already exists", st.name)
	}
	ctx, end := sess.beginStatement()
	defer end()
	res, err := sess.query(ctx, st.query, params)
	if err != nil {
		return err
	}
	sess.cursorSeq++
	sess.cursors[st.name] = &cursor{name: st.name, res: res, seq: sess.cursorSeq}
	return sess.complete("DECLARE CURSOR")
}

func (sess *session) fetch(st *fetchStmt, describe bool) error {
	c, ok := sess.cursors[st.name]
	if !ok {
		return errorf(codeInvalidCursor, "cursor %q does not exist", st.name)
	}
	if describe && !st.move {
		sess.w.Send(&pgproto3.RowDescription{Fields: c.res.fields})
	}
	verb := "FETCH "
	if st.move {
		verb = "MOVE "
	}
	if st.count == 0 {
		return sess.complete(verb + "0")
	}
	n, _, err := sess.sendRows(c.res, &c.pos, st.count, !st.move)
	if err != nil {
		return err
	}
	return sess.complete(verb + strconv.FormatInt(n, 10))
}

func (sess *session) transaction(st *txStmt) error {
	switch st.kind {
	case txBegin:
		if sess.tx != txIdle {
			sess.notice(codeActiveTx, "there is already a transaction in progress")
		} else {
			sess.tx = txBlock
			sess.txSnapshot = sess.set.clone()
			sess.savepoints = nil
		}
		if st.verb == "start" {
			return sess.complete("START TRANSACTION")
		}
		return sess.complete("BEGIN")
	case txCommit:
		switch sess.tx {
		case txIdle:
			sess.notice(codeNoActiveTx, "there is no transaction in progress")
			return sess.complete("COMMIT")
		case txFailed:
			sess.endTransaction(false)
			return sess.complete("ROLLBACK")
		}
		sess.endTransaction(true)
		return sess.complete("COMMIT")
	case txRollback:
		if sess.tx == txIdle {
			sess.notice(codeNoActiveTx, "there is no transaction in progress")
		} else {
			sess.endTransaction(false)
		}
		return sess.complete("ROLLBACK")
	case txSavepoint:
		if sess.tx == txIdle {
			return errorf(codeNoActiveTx, "SAVEPOINT can only be used in transaction blocks")
		}
		sess.savepoints = append(sess.savepoints, savepoint{name: st.name, settings: sess.set.clone(), cursorSeq: sess.cursorSeq})
		return sess.complete("SAVEPOINT")
	case txRelease, txRollbackTo:
		if sess.tx == txIdle {
			if st.kind == txRelease {
				return errorf(codeNoActiveTx, "RELEASE SAVEPOINT can only be used in transaction blocks")
			}
			return errorf(codeNoActiveTx, "ROLLBACK TO SAVEPOINT can only be used in transaction blocks")
		}
		i := len(sess.savepoints) - 1
		for i >= 0 && sess.savepoints[i].name != st.name {
			i--
		}
		if i < 0 {
			return errorf(codeSavepoint, "savepoint %q does not exist", st.name)
		}
		if st.kind == txRelease {
			sess.savepoints = sess.savepoints[:i]
			return sess.complete("RELEASE")
		}
		sp := sess.savepoints[i]
		sess.savepoints = sess.savepoints[:i+1]
		sess.set = sp.settings.clone()
		for name, c := range sess.cursors {
			if c.seq > sp.cursorSeq {
				delete(sess.cursors, name)
			}
		}
		sess.tx = txBlock
		return sess.complete("ROLLBACK")
	}
	return errorf(codeInternal, "unknown transaction statement")
}

// endTransaction ends the block: cursors and portals close, SET LOCAL
// values go, and a rollback restores the settings from BEGIN.
func (sess *session) endTransaction(commit bool) {
	if !commit && sess.txSnapshot != nil {
		sess.set = sess.txSnapshot
	}
	sess.set.local = map[string]string{}
	sess.txSnapshot = nil
	sess.savepoints = nil
	sess.cursors = map[string]*cursor{}
	sess.tx = txIdle
}

func (sess *session) setting(st *setStmt) error {
	tag := "SET"
	if st.resetCmd {
		tag = "RESET"
	}
	switch {
	case st.tx:
		return sess.complete(tag)
	case st.local && sess.tx == txIdle:
		sess.notice(codeNoActiveTx, "SET LOCAL can only be used in transaction blocks")
		return sess.complete(tag)
	case st.all:
		sess.set.resetAll()
	case st.reset:
		if err := sess.set.reset(st.name); err != nil {
			return err
		}
	default:
		if err := sess.set.set(st.name, st.value, st.local); err != nil {
			return err
		}
	}
	return sess.complete(tag)
}

func (sess *session) show(st *showStmt, describe bool) error {
	if st.name == "all" {
		var names []string
		for _, s := range settingList {
			names = append(names, s.name)
		}
		sort.Slice(names, func(i, j int) bool { return strings.ToLower(names[i]) < strings.ToLower(names[j]) })
		if describe {
			sess.w.Send(&pgproto3.RowDescription{Fields: textFields("name", "setting", "description")})
		}
		for _, n := range names {
			sess.w.Send(&pgproto3.DataRow{Values: [][]byte{[]byte(n), []byte(sess.set.get(strings.ToLower(n))), {}}})
		}
		return sess.complete("SHOW")
	}
	name := st.name
	if name == "time zone" {
		name = "timezone"
	}
	s, ok := settingsByName[name]
	v, custom := sess.set.session[name]
	if !ok && !custom {
		return errorf(codeUndefinedObject, "unrecognized configuration parameter %q", st.name)
	}
	if ok {
		name = s.name
		v = sess.set.get(strings.ToLower(s.name))
	}
	if describe {
		sess.w.Send(&pgproto3.RowDescription{Fields: textFields(name)})
	}
	sess.w.Send(&pgproto3.DataRow{Values: [][]byte{[]byte(v)}})
	return sess.complete("SHOW")
}

// Extended protocol.

// statementQuery is the SELECT a statement runs, if any.
func statementQuery(st stmt) *selectStmt {
	switch st := st.(type) {
	case *selectStmt:
		return st
	case *declareStmt:
		return st.query
	}
	return nil
}

func (sess *session) parse(m *pgproto3.Parse) error {
	if m.Name != "" {
		if _, ok := sess.prepared[m.Name]; ok {
			return errorf(codeDuplicateStatement, "prepared statement %q already exists", m.Name)
		}
	}
	sess.w.Log().Debug("sql endpoint parse", "name", m.Name, "sql", m.Query, "param_oids", m.ParameterOIDs)
	st, err := parseStatement(m.Query)
	if err != nil {
		return err
	}
	if err := sess.checkFailed(st); err != nil {
		return err
	}
	for i, oid := range m.ParameterOIDs {
		if _, ok := typeMap.TypeForOID(oid); !ok && oid != 0 {
			return notSupported("parameter $%d has type OID %d, which is not a built-in type: declare it as text (25) or leave it 0", i+1, oid)
		}
	}
	oids := append([]uint32(nil), m.ParameterOIDs...)
	if q := statementQuery(st); q != nil {
		for len(oids) < q.maxParam {
			oids = append(oids, 0)
		}
	}
	sess.prepared[m.Name] = &prepared{sql: m.Query, st: st, paramOIDs: oids}
	sess.w.Send(&pgproto3.ParseComplete{})
	return nil
}

func (sess *session) bind(m *pgproto3.Bind) error {
	prep, ok := sess.prepared[m.PreparedStatement]
	if !ok {
		if m.PreparedStatement == "" {
			return errorf(codeUnknownStatement, "unnamed prepared statement does not exist")
		}
		return errorf(codeUnknownStatement, "prepared statement %q does not exist", m.PreparedStatement)
	}
	if err := sess.checkFailed(prep.st); err != nil {
		return err
	}
	if len(m.Parameters) != len(prep.paramOIDs) {
		return errorf(codeProtocolViolation, "bind message supplies %d parameters, but prepared statement %q requires %d",
			len(m.Parameters), m.PreparedStatement, len(prep.paramOIDs))
	}
	for _, f := range m.ParameterFormatCodes {
		if f != 0 {
			return notSupported("binary parameter format is not supported: send parameters as text")
		}
	}
	for _, f := range m.ResultFormatCodes {
		if f != 0 {
			return notSupported("binary result format is not supported: ask for text results")
		}
	}
	if m.DestinationPortal != "" {
		if _, ok := sess.portals[m.DestinationPortal]; ok {
			return errorf(codeDuplicateCursor, "portal %q already exists", m.DestinationPortal)
		}
	}
	params := make([]paramVal, len(m.Parameters))
	for i, raw := range m.Parameters {
		params[i] = paramVal{oid: prep.paramOIDs[i], null: raw == nil, text: string(raw)}
	}
	sess.portals[m.DestinationPortal] = &portal{prep: prep, params: params}
	sess.w.Send(&pgproto3.BindComplete{})
	return nil
}

func (sess *session) describe(m *pgproto3.Describe) error {
	switch m.ObjectType {
	case 'S':
		prep, ok := sess.prepared[m.Name]
		if !ok {
			return errorf(codeUnknownStatement, "prepared statement %q does not exist", m.Name)
		}
		q := statementQuery(prep.st)
		if q == nil {
			sess.w.Send(&pgproto3.ParameterDescription{ParameterOIDs: prep.paramOIDs})
			return sess.describeResult(prep.st, nil)
		}
		ctx, end := sess.beginStatement()
		defer end()
		oids, fields, err := sess.srv.ev.describe(ctx, q, prep.paramOIDs)
		if err != nil {
			return err
		}
		sess.w.Send(&pgproto3.ParameterDescription{ParameterOIDs: oids})
		if _, ok := prep.st.(*selectStmt); ok {
			sess.w.Send(&pgproto3.RowDescription{Fields: fields})
			return nil
		}
		sess.w.Send(&pgproto3.NoData{})
		return nil
	case 'P':
		p, ok := sess.portals[m.Name]
		if !ok {
			return errorf(codeInvalidCursor, "portal %q does not exist", m.Name)
		}
		if _, ok := p.prep.st.(*selectStmt); ok {
			if err := sess.portalResult(p); err != nil {
				return err
			}
			sess.w.Send(&pgproto3.RowDescription{Fields: p.res.fields})
			return nil
		}
		return sess.describeResult(p.prep.st, p)
	}
	return errorf(codeProtocolViolation, "invalid DESCRIBE message subtype %d", m.ObjectType)
}

// describeResult sends RowDescription for statements that return rows and
// NoData for the others (DECLARE among them, as postgres_fdw expects).
func (sess *session) describeResult(st stmt, p *portal) error {
	switch st := st.(type) {
	case *fetchStmt:
		if c, ok := sess.cursors[st.name]; ok && !st.move {
			sess.w.Send(&pgproto3.RowDescription{Fields: c.res.fields})
			return nil
		}
	case *showStmt:
		sess.w.Send(&pgproto3.RowDescription{Fields: textFields(st.name)})
		return nil
	}
	sess.w.Send(&pgproto3.NoData{})
	return nil
}

func (sess *session) execute(m *pgproto3.Execute) error {
	p, ok := sess.portals[m.Portal]
	if !ok {
		return errorf(codeInvalidCursor, "portal %q does not exist", m.Portal)
	}
	_, isSelect := p.prep.st.(*selectStmt)
	if !isSelect && p.done {
		return sess.complete("")
	}
	err := sess.run(p.prep.st, p.params, p, m.MaxRows)
	if !isSelect {
		p.done = true
	}
	return err
}

func (sess *session) closeObject(m *pgproto3.Close) error {
	switch m.ObjectType {
	case 'S':
		delete(sess.prepared, m.Name)
	case 'P':
		delete(sess.portals, m.Name)
	default:
		return errorf(codeProtocolViolation, "invalid CLOSE message subtype %d", m.ObjectType)
	}
	sess.w.Send(&pgproto3.CloseComplete{})
	return nil
}
