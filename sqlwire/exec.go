package sqlwire

import (
	"context"
	"sort"
	"strconv"
	"strings"

	"github.com/jackc/pgx/v5/pgproto3"
)

// oidType maps the parameter type OIDs a Parse may declare.
var oidType = map[uint32]typ{
	0: tUnknown, 705: tUnknown, 25: tText, 1043: tText, 1042: tText, 19: tText, 16: tBool, 21: tInt2,
	23: tInt4, 20: tInt8, 700: tFloat4, 701: tFloat8, 1700: tNumeric, 1184: tTimestamptz, 1082: tDate,
}

// simpleQuery runs a simple-protocol Query: each statement in turn until
// one fails, then ReadyForQuery.
func (sess *session) simpleQuery(sql string) {
	sess.log.Debug("sql endpoint query", "sql", sql)
	delete(sess.prepared, "")
	delete(sess.portals, "")
	stmts, err := parseStatements(sql)
	if err != nil {
		sess.sendError(err)
		sess.readyForQuery()
		return
	}
	for _, st := range stmts {
		if _, ok := st.(*emptyStmt); ok {
			sess.be.Send(&pgproto3.EmptyQueryResponse{})
			continue
		}
		if err := sess.run(st, nil, nil, 0); err != nil {
			sess.sendError(err)
			break
		}
	}
	sess.endImplicit()
	sess.readyForQuery()
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
			withHint("send ROLLBACK, or ROLLBACK TO SAVEPOINT")
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
		sess.be.Send(&pgproto3.EmptyQueryResponse{})
		return nil
	}
	return errorf(codeInternal, "statement %T has no executor", st)
}

func (sess *session) complete(tag string) error {
	sess.be.Send(&pgproto3.CommandComplete{CommandTag: []byte(tag)})
	return nil
}

func (sess *session) rowDescription(names []string, types []typ) {
	fields := make([]pgproto3.FieldDescription, len(names))
	for i := range names {
		t := types[i]
		fields[i] = pgproto3.FieldDescription{Name: []byte(names[i]), DataTypeOID: typeOID[t],
			DataTypeSize: typeLen[t], TypeModifier: -1}
	}
	sess.be.Send(&pgproto3.RowDescription{Fields: fields})
}

func planTypes(p *plan) []typ {
	ts := make([]typ, len(p.targets))
	for i, t := range p.targets {
		ts[i] = resultType(t)
	}
	return ts
}

// sendRow sends one DataRow in text format.
func (sess *session) sendRow(row []value) {
	digits := sess.set.floatDigits()
	buf := sess.textBuf[:0]
	ends := make([]int, len(row))
	for i, v := range row {
		if !v.null {
			buf = appendText(buf, v, digits)
		}
		ends[i] = len(buf)
	}
	sess.textBuf = buf
	vals := sess.rowBuf[:0]
	start := 0
	for i, v := range row {
		if v.null {
			vals = append(vals, nil)
		} else {
			vals = append(vals, buf[start:ends[i]:ends[i]])
		}
		start = ends[i]
	}
	sess.rowBuf = vals
	sess.be.Send(&pgproto3.DataRow{Values: vals})
}

// sendRows sends up to limit rows (0: all) from it and reports how many
// and whether it ended.
func (sess *session) sendRows(ctx context.Context, it rowIter, limit int64, send bool) (n int64, done bool, err error) {
	for limit <= 0 || n < limit {
		row, err := it.next(ctx)
		if err != nil {
			return n, false, err
		}
		if row == nil {
			return n, true, nil
		}
		if send {
			sess.sendRow(row)
		}
		n++
		if send && n%flushEvery == 0 {
			if err := sess.be.Flush(); err != nil {
				return n, false, err
			}
		}
	}
	return n, false, nil
}

func (sess *session) runSelect(st *selectStmt, params []paramVal, p *portal, maxRows uint32) error {
	ctx, end := sess.beginStatement()
	defer end()
	if p == nil {
		pl, err := buildPlan(st, params, sess.set.location(), &sess.srv.cfg.Limits)
		if err != nil {
			return err
		}
		it, err := pl.open(ctx, sess.srv.src, newBudget(&sess.srv.cfg.Limits))
		if err != nil {
			return canceledOr(ctx, err)
		}
		sess.rowDescription(pl.names, planTypes(pl))
		n, _, err := sess.sendRows(ctx, it, 0, true)
		if err != nil {
			return canceledOr(ctx, err)
		}
		return sess.complete("SELECT " + strconv.FormatInt(n, 10))
	}
	if p.done {
		return sess.complete("SELECT 0")
	}
	if p.it == nil {
		it, err := p.plan.open(ctx, sess.srv.src, newBudget(&sess.srv.cfg.Limits))
		if err != nil {
			return canceledOr(ctx, err)
		}
		p.it = it
	}
	n, done, err := sess.sendRows(ctx, p.it, int64(maxRows), true)
	if err != nil {
		p.done = true
		return canceledOr(ctx, err)
	}
	p.sent += n
	if !done {
		sess.be.Send(&pgproto3.PortalSuspended{})
		return nil
	}
	p.done = true
	return sess.complete("SELECT " + strconv.FormatInt(n, 10))
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
			withHint("start a transaction with BEGIN first")
	}
	if _, ok := sess.cursors[st.name]; ok {
		return errorf(codeDuplicateCursor, "cursor %q already exists", st.name)
	}
	pl, err := buildPlan(st.query, params, sess.set.location(), &sess.srv.cfg.Limits)
	if err != nil {
		return err
	}
	ctx, end := sess.beginStatement()
	defer end()
	it, err := pl.open(ctx, sess.srv.src, newBudget(&sess.srv.cfg.Limits))
	if err != nil {
		return canceledOr(ctx, err)
	}
	sess.cursorSeq++
	sess.cursors[st.name] = &cursor{name: st.name, plan: pl, it: it, seq: sess.cursorSeq}
	return sess.complete("DECLARE CURSOR")
}

func (sess *session) fetch(st *fetchStmt, describe bool) error {
	c, ok := sess.cursors[st.name]
	if !ok {
		return errorf(codeInvalidCursor, "cursor %q does not exist", st.name)
	}
	if c.failed {
		return errorf(codeObjectState, "cursor %q failed earlier in this transaction", st.name).
			withHint("close it and declare it again")
	}
	if describe && !st.move {
		sess.rowDescription(c.plan.names, planTypes(c.plan))
	}
	verb := "FETCH "
	if st.move {
		verb = "MOVE "
	}
	if c.done || st.count == 0 {
		return sess.complete(verb + "0")
	}
	ctx, end := sess.beginStatement()
	defer end()
	n, done, err := sess.sendRows(ctx, c.it, st.count, !st.move)
	if err != nil {
		c.failed = true
		return canceledOr(ctx, err)
	}
	c.done = done
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
			sess.rowDescription([]string{"name", "setting", "description"}, []typ{tText, tText, tText})
		}
		for _, n := range names {
			sess.sendRow([]value{textVal(n), textVal(sess.set.get(strings.ToLower(n))), textVal("")})
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
		sess.rowDescription([]string{name}, []typ{tText})
	}
	sess.sendRow([]value{textVal(v)})
	return sess.complete("SHOW")
}

// Extended protocol.

func (sess *session) parse(m *pgproto3.Parse) error {
	if m.Name != "" {
		if _, ok := sess.prepared[m.Name]; ok {
			return errorf(codeDuplicateStatement, "prepared statement %q already exists", m.Name)
		}
	}
	sess.log.Debug("sql endpoint parse", "name", m.Name, "sql", m.Query, "param_oids", m.ParameterOIDs)
	st, err := parseStatement(m.Query)
	if err != nil {
		return err
	}
	if err := sess.checkFailed(st); err != nil {
		return err
	}
	types := make([]typ, len(m.ParameterOIDs))
	for i, oid := range m.ParameterOIDs {
		t, ok := oidType[oid]
		if !ok {
			return notSupported("parameter $%d has type OID %d, which the endpoint does not know: declare it as text (25) or leave it 0", i+1, oid)
		}
		types[i] = t
	}
	for n := maxParam(st); len(types) < n; {
		types = append(types, tUnknown)
	}
	inferParamTypes(st, types)
	sess.prepared[m.Name] = &prepared{sql: m.Query, st: st, paramTypes: types}
	sess.be.Send(&pgproto3.ParseComplete{})
	return nil
}

// maxParam is the highest $n a statement uses.
func maxParam(st stmt) int {
	var q *selectStmt
	switch st := st.(type) {
	case *selectStmt:
		q = st
	case *declareStmt:
		q = st.query
	default:
		return 0
	}
	n := 0
	visit := func(e expr) {
		walkExpr(e, func(x expr) {
			if p, ok := x.(*paramExpr); ok && p.n > n {
				n = p.n
			}
		})
	}
	for _, t := range q.targets {
		visit(t.x)
	}
	visit(q.where)
	if q.join != nil {
		visit(q.join.on)
	}
	for _, g := range q.groupBy {
		visit(g)
	}
	visit(q.having)
	for _, o := range q.orderBy {
		visit(o.x)
	}
	visit(q.limit)
	visit(q.offset)
	return n
}

// inferParamTypes gives undeclared parameters the type they are cast to
// ($1::integer) or the type of the column they are compared with
// (horizon <= $1), as Postgres' parse analysis would report them.
func inferParamTypes(st stmt, types []typ) {
	var q *selectStmt
	switch st := st.(type) {
	case *selectStmt:
		q = st
	case *declareStmt:
		q = st.query
	default:
		return
	}
	columnType := func(e expr) typ {
		r, ok := e.(*colRef)
		if !ok {
			return tUnknown
		}
		for _, tr := range q.from {
			if t := tables[tr.name]; t != nil && (r.rel == "" || r.rel == tr.alias || r.rel == tr.name) {
				if i := t.column(r.name); i >= 0 {
					return t.cols[i].t
				}
			}
		}
		return tUnknown
	}
	set := func(x expr, t typ) {
		if p, ok := x.(*paramExpr); ok && p.n <= len(types) && types[p.n-1] == tUnknown && t != tUnknown {
			types[p.n-1] = t
		}
	}
	visit := func(e expr) {
		walkExpr(e, func(x expr) {
			switch x := x.(type) {
			case *castExpr:
				if !x.array {
					set(x.x, x.t)
				}
			case *opExpr:
				if x.l != nil {
					set(x.l, columnType(x.r))
					set(x.r, columnType(x.l))
				}
			}
		})
	}
	visit(q.where)
	if q.join != nil {
		visit(q.join.on)
	}
	for _, t := range q.targets {
		visit(t.x)
	}
	visit(q.having)
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
	if len(m.Parameters) != len(prep.paramTypes) {
		return errorf(codeProtocolViolation, "bind message supplies %d parameters, but prepared statement %q requires %d",
			len(m.Parameters), m.PreparedStatement, len(prep.paramTypes))
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
		params[i] = paramVal{t: prep.paramTypes[i], known: true, null: raw == nil, text: string(raw)}
	}
	p := &portal{prep: prep, params: params}
	if q, ok := prep.st.(*selectStmt); ok {
		pl, err := buildPlan(q, params, sess.set.location(), &sess.srv.cfg.Limits)
		if err != nil {
			return err
		}
		p.plan = pl
	}
	sess.portals[m.DestinationPortal] = p
	sess.be.Send(&pgproto3.BindComplete{})
	return nil
}

func (sess *session) describe(m *pgproto3.Describe) error {
	switch m.ObjectType {
	case 'S':
		prep, ok := sess.prepared[m.Name]
		if !ok {
			return errorf(codeUnknownStatement, "prepared statement %q does not exist", m.Name)
		}
		oids := make([]uint32, len(prep.paramTypes))
		for i, t := range prep.paramTypes {
			if t == tUnknown {
				t = tText
			}
			oids[i] = typeOID[t]
		}
		sess.be.Send(&pgproto3.ParameterDescription{ParameterOIDs: oids})
		params := make([]paramVal, len(prep.paramTypes))
		for i, t := range prep.paramTypes {
			params[i] = paramVal{t: t}
		}
		return sess.describeResult(prep.st, params, nil)
	case 'P':
		p, ok := sess.portals[m.Name]
		if !ok {
			return errorf(codeInvalidCursor, "portal %q does not exist", m.Name)
		}
		return sess.describeResult(p.prep.st, p.params, p.plan)
	}
	return errorf(codeProtocolViolation, "invalid DESCRIBE message subtype %d", m.ObjectType)
}

// describeResult sends RowDescription for statements that return rows and
// NoData for the others (DECLARE among them, as postgres_fdw expects).
func (sess *session) describeResult(st stmt, params []paramVal, pl *plan) error {
	switch st := st.(type) {
	case *selectStmt:
		if pl == nil {
			var err error
			if pl, err = buildPlan(st, params, sess.set.location(), &sess.srv.cfg.Limits); err != nil {
				return err
			}
		}
		sess.rowDescription(pl.names, planTypes(pl))
		return nil
	case *fetchStmt:
		if c, ok := sess.cursors[st.name]; ok && !st.move {
			sess.rowDescription(c.plan.names, planTypes(c.plan))
			return nil
		}
	case *showStmt:
		sess.rowDescription([]string{st.name}, []typ{tText})
		return nil
	}
	sess.be.Send(&pgproto3.NoData{})
	return nil
}

func (sess *session) execute(m *pgproto3.Execute) error {
	p, ok := sess.portals[m.Portal]
	if !ok {
		return errorf(codeInvalidCursor, "portal %q does not exist", m.Portal)
	}
	if _, isSelect := p.prep.st.(*selectStmt); !isSelect && p.done {
		return sess.complete("")
	}
	err := sess.run(p.prep.st, p.params, p, m.MaxRows)
	if _, isSelect := p.prep.st.(*selectStmt); !isSelect {
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
	sess.be.Send(&pgproto3.CloseComplete{})
	return nil
}
