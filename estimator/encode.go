package estimator

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"math"
)

// ErrCorrupt is wrapped by every error about an encoding that cannot be
// decoded: wrong magic, unknown version, wrong length, bad checksum or
// values no update could have produced.
var ErrCorrupt = errors.New("estimator: corrupt state encoding")

// encodingVersion is the layout written by MarshalBinary. A new layout gets a
// new number; UnmarshalState keeps reading the old ones.
const encodingVersion = 2

var encodingMagic = [3]byte{'s', 't', 'S'}

var crcTable = crc32.MakeTable(crc32.Castagnoli)

// Layout of version 2, little endian:
//
//	magic "stS", version u8
//	degree u8, harmonics u8, burn-in u32, period f64, lambda f64,
//	seasonal lambda f64 (0: the same as lambda)
//	n i64, steps i64, T f64, S f64, Syy f64, Te f64, T2 f64 (version 2)
//	h [p]f64, F lower triangle row by row [p(p+1)/2]f64
//	error sums: n, nAPE, nInt, in80, in95 i64; sumAbs, sumSq, sumErr, sumAPE,
//	            dAbs, dSq, dWeight f64
//	crc32-C of everything before, u32
//
// Derived values (Cholesky factor, theta, condition number) are recomputed on
// decode by the same code that computed them on update, so a decoded state
// answers bit for bit as the encoded one did.
//
// Version 1 is version 2 without the seasonal lambda, Te and T2; it still
// decodes, as a state with one factor whose S counts as T - p unit terms
// (Te = T2 = max(0, T - p), what the scale of its intervals was).
func encodedLen(p int, version byte) int {
	n := 4 + 2 + 4 + 8 + 8 + 2*8 + 3*8 + 8*p + 8*(p*(p+1)/2) + 5*8 + 7*8 + 4
	if version >= 2 {
		n += 3 * 8
	}
	return n
}

// MarshalBinary encodes the state compactly; UnmarshalState reverses it.
func (st *State) MarshalBinary() ([]byte, error) {
	p := st.p
	b := make([]byte, 0, encodedLen(p, encodingVersion))
	b = append(b, encodingMagic[:]...)
	b = append(b, encodingVersion, byte(st.spec.Degree), byte(st.spec.Harmonics))
	b = binary.LittleEndian.AppendUint32(b, uint32(st.spec.BurnIn))
	f := func(x float64) { b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x)) }
	i := func(x int64) { b = binary.LittleEndian.AppendUint64(b, uint64(x)) }
	f(st.spec.Period)
	f(st.spec.Lambda)
	f(st.spec.SeasonLambda)
	i(st.n)
	i(st.steps)
	f(st.t)
	f(st.s)
	f(st.syy)
	f(st.te)
	f(st.t2)
	for _, x := range st.h {
		f(x)
	}
	for r := 0; r < p; r++ {
		for c := 0; c <= r; c++ {
			f(st.f[r*p+c])
		}
	}
	es := st.errs
	for _, x := range []int64{es.n, es.nAPE, es.nInt, es.in80, es.in95} {
		i(x)
	}
	for _, x := range []float64{es.sumAbs, es.sumSq, es.sumErr, es.sumAPE, es.dAbs, es.dSq, es.dWeight} {
		f(x)
	}
	b = binary.LittleEndian.AppendUint32(b, crc32.Checksum(b, crcTable))
	return b, nil
}

// UnmarshalState decodes a state written by MarshalBinary. Any damage is an
// error wrapping ErrCorrupt; nothing is guessed.
func UnmarshalState(b []byte) (*State, error) {
	if len(b) < 10 || [3]byte(b[:3]) != encodingMagic {
		return nil, fmt.Errorf("%w: not a sidetrend state", ErrCorrupt)
	}
	version := b[3]
	if version != 1 && version != encodingVersion {
		return nil, fmt.Errorf("%w: encoding version %d is not known to this build (it reads versions 1 to %d)", ErrCorrupt, version, encodingVersion)
	}
	if len(b) < 4+2+4+16 {
		return nil, fmt.Errorf("%w: %d bytes is too short", ErrCorrupt, len(b))
	}
	body, sum := b[:len(b)-4], binary.LittleEndian.Uint32(b[len(b)-4:])
	if crc32.Checksum(body, crcTable) != sum {
		return nil, fmt.Errorf("%w: checksum mismatch", ErrCorrupt)
	}
	r := reader{b: b[4:]}
	spec := Spec{Degree: int(r.u8()), Harmonics: int(r.u8())}
	burnIn := r.u32()
	if burnIn > math.MaxInt32 {
		return nil, fmt.Errorf("%w: burn-in %d out of range", ErrCorrupt, burnIn)
	}
	spec.BurnIn = int(burnIn)
	if len(b) < 4+2+4+24+8*int(version-1) {
		return nil, fmt.Errorf("%w: %d bytes is too short", ErrCorrupt, len(b))
	}
	spec.Period, spec.Lambda = r.f64(), r.f64()
	if version >= 2 {
		spec.SeasonLambda = r.f64()
		if spec.SeasonLambda != 0 && spec.SeasonLambda == spec.Lambda || spec.SeasonLambda != 0 && spec.Harmonics == 0 {
			return nil, fmt.Errorf("%w: seasonal lambda %v is not in canonical form", ErrCorrupt, spec.SeasonLambda)
		}
	}
	if err := spec.Validate(); err != nil {
		return nil, fmt.Errorf("%w: %v", ErrCorrupt, err)
	}
	p := spec.Params()
	if len(b) != encodedLen(p, version) {
		return nil, fmt.Errorf("%w: %d bytes where a %d-parameter state has %d", ErrCorrupt, len(b), p, encodedLen(p, version))
	}
	st, err := NewState(spec)
	if err != nil {
		return nil, fmt.Errorf("%w: %v", ErrCorrupt, err)
	}
	st.n, st.steps = r.i64(), r.i64()
	st.t, st.s, st.syy = r.f64(), r.f64(), r.f64()
	if version >= 2 {
		st.te, st.t2 = r.f64(), r.f64()
	} else {
		st.te = math.Max(0, st.t-float64(p))
		st.t2 = st.te
	}
	for k := range st.h {
		st.h[k] = r.f64()
	}
	for row := 0; row < p; row++ {
		for c := 0; c <= row; c++ {
			x := r.f64()
			st.f[row*p+c], st.f[c*p+row] = x, x
		}
	}
	es := &st.errs
	for _, x := range []*int64{&es.n, &es.nAPE, &es.nInt, &es.in80, &es.in95} {
		*x = r.i64()
	}
	for _, x := range []*float64{&es.sumAbs, &es.sumSq, &es.sumErr, &es.sumAPE, &es.dAbs, &es.dSq, &es.dWeight} {
		*x = r.f64()
	}
	if err := st.plausible(); err != nil {
		return nil, fmt.Errorf("%w: %v", ErrCorrupt, err)
	}
	st.refactor()
	return st, nil
}

// DecodeFor decodes a state and checks that it was built for want; a state
// of another model is an error that says which setting differs.
func DecodeFor(b []byte, want Spec) (*State, error) {
	st, err := UnmarshalState(b)
	if err != nil {
		return nil, err
	}
	if got := st.spec; got != want.Canonical() {
		return nil, fmt.Errorf("estimator: stored state is for %v but the tracker now asks for %v: rebuild the series", got, want)
	}
	return st, nil
}

// String formats a spec the way errors and logs show it.
func (s Spec) String() string {
	out := fmt.Sprintf("degree %d, lambda %v", s.Degree, s.Lambda)
	if s.Period > 0 {
		out += fmt.Sprintf(", period %v with %d harmonics", s.Period, s.Harmonics)
	}
	if c := s.Canonical(); c.SeasonLambda != 0 {
		out += fmt.Sprintf(", seasonal lambda %v", c.SeasonLambda)
	}
	if s.BurnIn > 0 {
		out += fmt.Sprintf(", burn-in %d", s.BurnIn)
	}
	return out
}

// plausible rejects decoded values that no sequence of updates produces.
func (st *State) plausible() error {
	if st.n < 0 || st.steps < st.n {
		return fmt.Errorf("counts %d observed of %d steps", st.n, st.steps)
	}
	if !finite(st.t) || st.t < 0 || !finite(st.s) || st.s < 0 || !finite(st.syy) || st.syy < 0 ||
		!finite(st.te) || st.te < 0 || !finite(st.t2) || st.t2 < 0 {
		return errors.New("weights or sums are negative or not finite")
	}
	if !allFinite(st.h) || !allFinite(st.f) {
		return errors.New("F or h is not finite")
	}
	for k := 0; k < st.p; k++ {
		if st.f[k*st.p+k] < 0 {
			return errors.New("F has a negative diagonal")
		}
	}
	es := st.errs
	if es.n < 0 || es.nAPE < 0 || es.nInt < 0 || es.in80 < 0 || es.in95 < 0 ||
		es.nAPE > es.n || es.nInt > es.n || es.in80 > es.nInt || es.in95 > es.nInt || es.n > st.n {
		return errors.New("error counts are inconsistent")
	}
	for _, x := range []float64{es.sumAbs, es.sumSq, es.sumAPE, es.dAbs, es.dSq, es.dWeight} {
		if !finite(x) || x < 0 {
			return errors.New("error sums are negative or not finite")
		}
	}
	if !finite(es.sumErr) {
		return errors.New("error sums are not finite")
	}
	return nil
}

type reader struct{ b []byte }

func (r *reader) u8() byte {
	v := r.b[0]
	r.b = r.b[1:]
	return v
}

func (r *reader) u32() uint32 {
	v := binary.LittleEndian.Uint32(r.b)
	r.b = r.b[4:]
	return v
}

func (r *reader) i64() int64 {
	v := binary.LittleEndian.Uint64(r.b)
	r.b = r.b[8:]
	return int64(v)
}

func (r *reader) f64() float64 { return math.Float64frombits(uint64(r.i64())) }
