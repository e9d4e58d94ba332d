package pgsync

import (
	"context"
	"encoding/binary"
	"math"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
)

// float8ArrayCodec is pgx's codec for float8[] with a direct binary encoder
// for []float64, the type of every forecast array the drain sends. pgx's
// generic array path boxes each element into an interface and plans its
// encoding: for the drain's few hundred thousand elements per batch that was
// a third of the sidecar's CPU (measured with the pipeline benchmark's CPU
// profile). Every other value and all decoding go to pgx's own codec.
type float8ArrayCodec struct{ pgtype.Codec }

func (c float8ArrayCodec) PlanEncode(m *pgtype.Map, oid uint32, format int16, value any) pgtype.EncodePlan {
	if _, ok := value.([]float64); ok && format == pgtype.BinaryFormatCode {
		return float8ArrayEncoder{}
	}
	return c.Codec.PlanEncode(m, oid, format, value)
}

type float8ArrayEncoder struct{}

// Encode writes xs in the binary array format Postgres' array_recv reads:
// the number of dimensions, a has-nulls flag, the element type, each
// dimension's length and lower bound, then every element as its length and
// its IEEE 754 bits, big-endian. A nil slice is NULL, as in pgx.
func (float8ArrayEncoder) Encode(value any, buf []byte) ([]byte, error) {
	xs := value.([]float64)
	if xs == nil {
		return nil, nil
	}
	be := binary.BigEndian
	ndim := uint32(1)
	if len(xs) == 0 {
		ndim = 0
	}
	buf = be.AppendUint32(buf, ndim)
	buf = be.AppendUint32(buf, 0) // no NULL elements
	buf = be.AppendUint32(buf, pgtype.Float8OID)
	if ndim == 1 {
		buf = be.AppendUint32(buf, uint32(len(xs)))
		buf = be.AppendUint32(buf, 1) // lower bound
	}
	// buf holds all of a statement's parameters, and pgx starts it small
	// for every statement: grow it by doubling, so that the few-hundred-
	// kilobyte arrays of a batch do not each copy everything before them.
	if need := 12 * len(xs); cap(buf)-len(buf) < need {
		grown := make([]byte, len(buf), 2*(len(buf)+need))
		copy(grown, buf)
		buf = grown
	}
	for _, x := range xs {
		buf = be.AppendUint32(buf, 8)
		buf = be.AppendUint64(buf, math.Float64bits(x))
	}
	return buf, nil
}

// registerCodecs installs the sidecar's codecs on a new connection.
func registerCodecs(_ context.Context, conn *pgx.Conn) error {
	m := conn.TypeMap()
	if t, ok := m.TypeForOID(pgtype.Float8ArrayOID); ok {
		m.RegisterType(&pgtype.Type{Name: t.Name, OID: t.OID, Codec: float8ArrayCodec{t.Codec}})
	}
	return nil
}
