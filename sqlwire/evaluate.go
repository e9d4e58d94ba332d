package sqlwire

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"strconv"
	"strings"

	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgproto3"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"
	pg "github.com/pganalyze/pg_query_go/v6"
)

// Postgres evaluates Postgres: the endpoint computes the rows of its
// tables and has the sidecar's own database run the client's query over
// them, so that every condition, expression, sort, aggregate and LIMIT
// has exactly Postgres' meaning. Each endpoint table in FROM becomes
//
//	(SELECT pg_catalog.unnest($k::pg_catalog.text[] COLLATE "C") AS tracker,
//	        pg_catalog.unnest($k+1::pg_catalog.int4[]) AS horizon, ...) alias
//
// over the columns the query uses, sent as binary arrays after the
// client's own parameters, and the tree is deparsed back to SQL by the same library
// that parsed it. The query runs in a read-only transaction with
// search_path pg_catalog and the client's TimeZone, DateStyle,
// IntervalStyle and extra_float_digits, in one round trip; rows come back
// in text and go to the client as they are.

// paramVal is one parameter of a bound statement, as the client sent it.
type paramVal struct {
	oid  uint32 // declared by Parse; 0 lets Postgres infer it
	null bool
	text string
}

// result is what a SELECT returned, held for the client.
type result struct {
	fields []pgproto3.FieldDescription
	rows   [][][]byte
}

// evaluator runs queries in the sidecar's database.
type evaluator struct {
	pool *pgxpool.Pool
}

// arrayOID is the array type of each column type the tables send.
var arrayOID = map[string]uint32{
	"text": pgtype.TextArrayOID, "float8": pgtype.Float8ArrayOID, "int4": pgtype.Int4ArrayOID,
	"int8": pgtype.Int8ArrayOID, "timestamptz": pgtype.TimestamptzArrayOID,
}

// rowsSQL is the FROM item that stands for the computed rows of r: the
// columns the query uses, from parameters firstParam on, unnested side by
// side in the select list (ProjectSet, which streams, where ROWS FROM
// would first copy every array into a tuplestore).
func rowsSQL(r *relRef, firstParam int) string {
	var b strings.Builder
	b.WriteString("(SELECT ")
	for i, j := range r.used {
		c := r.table.Columns[j]
		if i > 0 {
			b.WriteString(", ")
		}
		fmt.Fprintf(&b, "pg_catalog.unnest($%d::pg_catalog.%s[]", firstParam+i, c.SQL)
		if c.SQL == "text" {
			b.WriteString(` COLLATE "C"`)
		}
		b.WriteString(") AS ")
		b.WriteString(c.Name)
	}
	b.WriteString(")")
	return b.String()
}

// placeholder names the computed rows in the deparsed text until rowsSQL
// replaces it: random per process, so no client can write it.
var placeholder = func() string {
	var b [8]byte
	rand.Read(b[:])
	return "sidetrend_rows_" + hex.EncodeToString(b[:]) + "_"
}()

// deparse writes q back as SQL with each endpoint table replaced by its
// computed rows, whose parameters follow the client's. The library
// deparses the tree with a placeholder table carrying the alias and
// alias; the rows' subquery is spliced in for the placeholder (the library
// takes ten times longer to print thirteen unnest calls than a whole
// statement).
func deparse(q *selectStmt, nparams int) (string, error) {
	type savedRV struct {
		schema, name string
		alias        *pg.Alias
	}
	saved := make([]savedRV, len(q.rels))
	next := nparams + 1
	repl := make([]string, 0, 2*len(q.rels))
	for i, r := range q.rels {
		rv := r.rv
		saved[i] = savedRV{rv.Schemaname, rv.Relname, rv.Alias}
		name := placeholder + strconv.Itoa(i)
		rv.Schemaname, rv.Relname, rv.Alias = "", name, &pg.Alias{Aliasname: r.alias}
		repl = append(repl, name, rowsSQL(r, next))
		next += len(r.used)
	}
	defer func() {
		for i, r := range q.rels {
			r.rv.Schemaname, r.rv.Relname, r.rv.Alias = saved[i].schema, saved[i].name, saved[i].alias
		}
	}()
	tree := &pg.ParseResult{Stmts: []*pg.RawStmt{{Stmt: &pg.Node{Node: &pg.Node_SelectStmt{SelectStmt: q.sel}}}}}
	sql, err := deparseTree(tree)
	if err != nil {
		return "", errorf(codeInternal, "deparse the query: %v", err)
	}
	// The longest name first: placeholder_1 is a prefix of placeholder_10.
	for i := len(repl) - 2; i >= 0; i -= 2 {
		if strings.Count(sql, repl[i]) != 1 {
			return "", errorf(codeInternal, "deparse the query: table %d is not where it was", i/2)
		}
		sql = strings.Replace(sql, repl[i], repl[i+1], 1)
	}
	return sql, nil
}

// sessionSQL applies the client's settings for the rest of the
// transaction.
const sessionSQL = `SELECT pg_catalog.set_config('search_path', 'pg_catalog', true),
	pg_catalog.set_config('TimeZone', $1, true), pg_catalog.set_config('DateStyle', $2, true),
	pg_catalog.set_config('IntervalStyle', $3, true), pg_catalog.set_config('extra_float_digits', $4, true)`

// exec runs one query with the client's settings in a read-only
// transaction, in one round trip, and returns its columns and rows; each
// row is passed to hold first, whose error stops the query.
func (ev *evaluator) exec(ctx context.Context, set *settings, sql string, values [][]byte, oids []uint32,
	formats, resultFormats []int16, hold func(row [][]byte) error) (*result, error) {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	c, err := ev.pool.Acquire(ctx)
	if err != nil {
		return nil, dbError(ctx, err)
	}
	defer c.Release()
	b := &pgconn.Batch{}
	b.ExecParams("BEGIN READ ONLY", nil, nil, nil, nil)
	b.ExecParams(sessionSQL, [][]byte{[]byte(set.get("timezone")), []byte(set.get("datestyle")),
		[]byte(set.get("intervalstyle")), []byte(set.get("extra_float_digits"))}, nil, nil, nil)
	b.ExecParams(sql, values, oids, formats, resultFormats)
	b.ExecParams("COMMIT", nil, nil, nil, nil)
	mrr := c.Conn().PgConn().ExecBatch(ctx, b)
	res := &result{}
	var stop error
	for i := 0; mrr.NextResult(); i++ {
		rr := mrr.ResultReader()
		if i == 2 {
			res.fields = fieldsOf(rr.FieldDescriptions())
			for stop == nil && rr.NextRow() {
				row := make([][]byte, len(rr.Values()))
				for j, v := range rr.Values() {
					if v != nil { // NULL stays nil; an empty value is not NULL
						row[j] = append(make([]byte, 0, len(v)), v...)
					}
				}
				if stop = hold(row); stop == nil {
					res.rows = append(res.rows, row)
				}
			}
			if stop != nil {
				cancel() // the rest of the result is not wanted
				break
			}
		}
		if _, err := rr.Close(); err != nil {
			mrr.Close()
			return nil, ev.failure(ctx, err)
		}
	}
	if stop != nil {
		mrr.Close()
		return nil, stop
	}
	if err := mrr.Close(); err != nil {
		return nil, ev.failure(ctx, err)
	}
	return res, nil
}

// dbError is the error of a connection to the sidecar's database that
// could not be had.
func dbError(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		return statementCanceled(ctx)
	}
	return errorf(codeInternal, "connect to the sidecar's database: %v", err)
}

func (ev *evaluator) failure(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		return statementCanceled(ctx)
	}
	return postgresError(err)
}

// postgresError passes an error of the sidecar's Postgres on to the
// client with its SQLSTATE; its position refers to the deparsed text, so
// it is dropped.
func postgresError(err error) error {
	var pe *pgconn.PgError
	if errors.As(err, &pe) {
		return &sqlError{Code: pe.Code, Severity: "ERROR", Message: pe.Message, Detail: pe.Detail, Hint: pe.Hint}
	}
	return errorf(codeInternal, "the sidecar's database: %v", err)
}

// constants evaluates the constant sides of the conditions (pushdown.go).
func (ev *evaluator) constants(ctx context.Context, p *pushdown, set *settings) ([]bound, error) {
	sql, err := deparseTree(p.constQuery())
	if err != nil {
		return nil, errorf(codeInternal, "deparse the bounds: %v", err)
	}
	res, err := ev.exec(ctx, set, sql, nil, nil, nil, []int16{pgtype.BinaryFormatCode}, func([][]byte) error { return nil })
	if err != nil {
		return nil, err
	}
	out := make([]bound, len(p.consts))
	if len(res.rows) != 1 {
		return nil, errorf(codeInternal, "the bounds query returned %d rows", len(res.rows))
	}
	for i, f := range res.fields {
		out[i] = decodeBound(f.DataTypeOID, res.rows[0][i])
	}
	return out, nil
}

// run evaluates q over the computed rows.
func (ev *evaluator) run(ctx context.Context, q *selectStmt, params []paramVal, rows []*livetables.Rows, set *settings, b *budget) (*result, error) {
	sql, err := q.evalSQL(len(params))
	if err != nil {
		return nil, err
	}
	var values [][]byte
	var oids []uint32
	var formats []int16
	for _, p := range params {
		if p.null {
			values = append(values, nil)
		} else {
			values = append(values, []byte(p.text))
		}
		oids = append(oids, p.oid)
		formats = append(formats, pgtype.TextFormatCode)
	}
	for i, r := range q.rels {
		for _, j := range r.used {
			c := r.table.Columns[j]
			values = append(values, rows[i].EncodeArray(j, make([]byte, 0, 20+rows[i].N*16)))
			oids = append(oids, arrayOID[c.SQL])
			formats = append(formats, pgtype.BinaryFormatCode)
		}
	}
	n := int64(0)
	return ev.exec(ctx, set, sql, values, oids, formats, nil, func(row [][]byte) error {
		n++
		held := int64(24 * len(row))
		for _, v := range row {
			held += int64(len(v))
		}
		if err := b.holdBytes(held, "the result"); err != nil {
			return b.memoryError(b.held, fmt.Sprintf("the result (over %s rows)", formatCount(n)))
		}
		return nil
	})
}

func fieldsOf(fds []pgconn.FieldDescription) []pgproto3.FieldDescription {
	out := make([]pgproto3.FieldDescription, len(fds))
	for i, f := range fds {
		out[i] = pgproto3.FieldDescription{Name: []byte(f.Name), DataTypeOID: f.DataTypeOID,
			DataTypeSize: f.DataTypeSize, TypeModifier: f.TypeModifier}
	}
	return out
}

// describe asks Postgres for the parameter types and result columns of q
// without computing anything: the tables stand in with no rows.
func (ev *evaluator) describe(ctx context.Context, q *selectStmt, declared []uint32) ([]uint32, []pgproto3.FieldDescription, error) {
	sql, err := q.evalSQL(len(declared))
	if err != nil {
		return nil, nil, err
	}
	oids := append([]uint32(nil), declared...)
	for _, r := range q.rels {
		for _, j := range r.used {
			oids = append(oids, arrayOID[r.table.Columns[j].SQL])
		}
	}
	c, err := ev.pool.Acquire(ctx)
	if err != nil {
		return nil, nil, dbError(ctx, err)
	}
	defer c.Release()
	sd, err := c.Conn().PgConn().Prepare(ctx, "", sql, oids)
	if err != nil {
		if ctx.Err() != nil {
			return nil, nil, statementCanceled(ctx)
		}
		return nil, nil, postgresError(err)
	}
	return sd.ParamOIDs[:len(declared)], fieldsOf(sd.Fields), nil
}
