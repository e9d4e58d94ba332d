package estimator

import (
	"bytes"
	"encoding/binary"
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// Run the fuzzers with, for example,
//
//	go test -run '^$' -fuzz FuzzUnmarshalState -fuzztime 60s ./estimator/
//	go test -run '^$' -fuzz FuzzUpdate -fuzztime 60s ./estimator/
//
// Without -fuzz they run once over their seed corpus as ordinary tests.

// FuzzUnmarshalState: arbitrary bytes never panic; they decode to an error
// or to a state that re-encodes to the same bytes. Each input is tried
// twice, as given and with its checksum made right, so that the fuzzer
// reaches the field checks behind the CRC.
func FuzzUnmarshalState(f *testing.F) {
	rng := rand.New(rand.NewPCG(1, 1))
	for i := 0; i < 16; i++ {
		f.Add(mustMarshal(f, randomState(f, rng)))
	}
	f.Add([]byte{})
	f.Add([]byte("stS"))
	f.Add([]byte("stS\x01\x00\x00\x00\x00\x00\x00"))
	f.Fuzz(func(t *testing.T, data []byte) {
		began := time.Now()
		defer func() {
			if took := time.Since(began); took > fuzzDeadline {
				t.Fatalf("one input took %v, more than %v", took, fuzzDeadline)
			}
		}()
		for _, b := range [][]byte{data, withCRC(data)} {
			st, err := UnmarshalState(b)
			if err != nil {
				continue
			}
			again, err := st.MarshalBinary()
			if err != nil {
				t.Fatalf("re-encoding a decoded state: %v", err)
			}
			if b[3] == 1 {
				// Version 1 re-encodes as the current version, which must
				// then round-trip exactly.
				st2, err := UnmarshalState(again)
				if err != nil {
					t.Fatalf("version 1 state re-encoded does not decode: %v", err)
				}
				b, again = again, mustMarshal(t, st2)
			}
			if !bytes.Equal(again, b) {
				t.Fatalf("decoded state re-encodes differently:\n in  %x\n out %x", b, again)
			}
			// A decoded state must survive every query and update.
			_ = st.Ready()
			_, _ = st.Theta()
			_, _ = st.Forecast(12)
			_, _ = st.Slope()
			_ = st.Errors()
			_, _ = st.Observe(1)
			_ = st.Skip(3)
		}
	})
}

// updateSpecs are the models FuzzUpdate picks from with its first byte.
var updateSpecs = []Spec{
	{Degree: 0, Lambda: 0.9},
	{Degree: 1, Lambda: 0.95},
	{Degree: 1, Lambda: 1},
	{Degree: 2, Lambda: 0.99, BurnIn: 2},
	{Degree: 3, Lambda: 0.6},
	{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.97},
	{Degree: 0, Period: 4, Harmonics: 2, Lambda: 0.8},
	{Degree: 2, Period: 365.25 / 7, Harmonics: 1, Lambda: 0.999},
	{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.7, SeasonLambda: 0.99},
	{Degree: 2, Period: 12, Harmonics: 6, Lambda: 0.99, SeasonLambda: 0.6},
}

// fuzzOps encodes a script for FuzzUpdate: a spec byte, then 9 bytes per
// operation: a kind byte and 8 bytes of float64 bits. Kinds 0-5 observe the
// float, 6 skips float-bits mod 16 buckets, 7 skips (int64 of the bits),
// which may be negative or huge. The spec byte picks the model (mod 8); with
// bit 3 (warmUp) set the script starts after 30 values 100 + i%5.
func fuzzOps(spec byte, ops ...any) []byte {
	b := []byte{spec}
	for _, op := range ops {
		switch v := op.(type) {
		case float64:
			b = append(b, 0)
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		case int:
			b = append(b, 7)
			b = binary.LittleEndian.AppendUint64(b, uint64(int64(v)))
		}
	}
	return b
}

// warmUp is the bit of the spec byte that starts a script with 30 values.
const warmUp = 8

// maxFuzzOps bounds the operations of one FuzzUpdate input; the rest of a
// longer input is ignored. The fuzzer minimizes every input that finds new
// code by trying to remove each byte and each run of bytes (tries that grow
// with the square of its length), up to -fuzzminimizetime (60 s by default)
// per input: with the warm-up spelled out in the seeds, inputs of 600 to
// 2,142 bytes (up to 238 operations, each checked by encoding, decoding and
// forecasting) kept a worker minimizing for the whole minute again and
// again, which is the stall of issue 17 ("22 inputs in 150 s"). No single
// input took longer than 50 ms: no state of the estimator's is slow. At 32
// operations minimizing still paused a worker for up to 25 s; at 16 an
// input costs about 50 us and a minimization a few seconds.
const maxFuzzOps = 16

// fuzzDeadline is the longest one input may take: a slower one fails, so
// that the fuzzer saves it.
const fuzzDeadline = time.Second

// FuzzUpdate: arbitrary values (NaN, Inf, 1e300, -0, subnormals) and gap
// lengths never panic; a failed update is an error that leaves the state
// exactly as it was (same encoding); and a Ready state's forecasts hold no
// NaN or Inf, except the interval values (SE, bounds, sigma, quantiles)
// while T - p <= 0 gives no degrees of freedom, and the bounds and quantiles
// while T - p is too small for a finite t quantile. No input takes more than
// fuzzDeadline.
func FuzzUpdate(f *testing.F) {
	specials := []float64{math.NaN(), math.Inf(1), math.Inf(-1), 1e300, -1e300, math.Copysign(0, -1),
		5e-324, -2.2250738585072014e-308, math.MaxFloat64, 1e154, 1.4e154, -1e-300, 1}
	for s := range updateSpecs {
		// Each special value after a warm-up, followed by a normal value
		// and a gap: three scripts of up to 15 operations per model.
		for part := 0; part < 3; part++ {
			var ops []any
			for i, x := range specials {
				if i%3 == part {
					ops = append(ops, x, 100.0, i*1000-3000)
				}
			}
			f.Add(fuzzOps(byte(s)|warmUp, ops...))
		}
	}
	f.Add(fuzzOps(1, 1.0, 2.0, 3.0, 1<<62, 4.0, 5.0))
	f.Add(fuzzOps(2, 1e150, -1e150, 1e150, -1e150, 1e150, 3, 1e150))
	f.Add(fuzzOps(3, 5e-324, 5e-324, 1e-320, 0.0, 5e-324, 1e-310))
	// Found by the fuzzer: T - p = 0.0057 after a long gap, where the 95 %
	// t quantile overflowed to +Inf in a Ready state.
	f.Add([]byte("000000000070\x00\x00\x00\x00\x00\x00\x000000000000"))
	// Found by the fuzzer: two huge skips overflowed the int64 bucket
	// count, and the state no longer decoded.
	f.Add([]byte("070000000X700000000"))
	// Found by the fuzzer: S from its definition, syy - h^T theta, was
	// Inf - Inf = NaN for values near 1e154 (now a sum of squares).
	f.Add([]byte("70000000\xe7_000000000000000000000000000000000000"))
	// Found by the fuzzer: a tiny value and a long gap left F with a
	// diagonal entry of -1e-241, and the state no longer decoded.
	f.Add([]byte("%00000000072B\x00\x00\x00\x00\x00\x00000000000"))
	f.Add([]byte("%00000000079B\x00\x00\x00\x00\x00\x00000000000"))
	// Found by the fuzzer (cut to 11 operations): sigma = sqrt(S / (T - p))
	// overflowed to +Inf for S = 9.3e306 and T - p = 0.0085.
	f.Add([]byte("%\x02\xf17pEzF\x9a\xb1\x11\a\t\xa8\x02[P\x9aZ\xea\xa5LHu\xd7ñ\xd8L\x89\xae\xd4JP)\x10/\x16\xf8\x80\"\x88\v\xffb4\x99\x9d\x97ܥ\x1bO&\xc4\f\xb96\xa6\x15]\xfde\x9b\x9a\xdd\tT\x1d1\xd4J\xd5^\xf9\r\x02݂x,\x87\x1c\xdd\xcd\xe0\xd0u\xaa\x85Sq\xef\xa2RI\xf1\xbc\xde\xdf"))
	// testdata/fuzz/FuzzUpdate/aa6fb0477bc0aab4 is the 2,142-byte input a
	// worker spent the whole minute minimizing (see maxFuzzOps).
	f.Fuzz(fuzzUpdate)
}

func fuzzUpdate(t *testing.T, data []byte) {
	if len(data) == 0 {
		return
	}
	began := time.Now()
	st, err := NewState(updateSpecs[int(data[0])%len(updateSpecs)])
	if err != nil {
		t.Fatal(err)
	}
	if data[0]&warmUp != 0 {
		for i := 0; i < 30; i++ {
			if _, err := st.Observe(100 + float64(i%5)); err != nil {
				t.Fatal(err)
			}
		}
	}
	data = data[1:]
	for op := 0; len(data) >= 9 && op < maxFuzzOps; op++ {
		kind, bits := data[0], binary.LittleEndian.Uint64(data[1:9])
		data = data[9:]
		before := mustMarshal(t, st)
		var err error
		switch {
		case kind%8 < 6:
			_, err = st.Observe(math.Float64frombits(bits))
		case kind%8 == 6:
			err = st.Skip(int(bits % 16))
		default:
			err = st.Skip(int(int64(bits)))
		}
		after := mustMarshal(t, st)
		if err != nil && !bytes.Equal(before, after) {
			t.Fatalf("failed update (%v) changed the state", err)
		}
		if dec, err := UnmarshalState(after); err != nil {
			t.Fatalf("state after an update does not decode: %v", err)
		} else if !bytes.Equal(mustMarshal(t, dec), after) {
			t.Fatal("state after an update does not round-trip")
		}
		checkFinite(t, st)
	}
	if took := time.Since(began); took > fuzzDeadline {
		t.Fatalf("one input took %v, more than %v", took, fuzzDeadline)
	}
}

// checkFinite fails when a Ready state answers with NaN or Inf where a
// number is due.
func checkFinite(t *testing.T, st *State) {
	t.Helper()
	if !st.Ready() {
		return
	}
	fc, err := st.Forecast(12)
	if err != nil {
		t.Fatalf("Ready state: Forecast: %v", err)
	}
	// bad runs for every value checked: no t.Helper here (it walks the
	// stack, and was 40 % of the fuzzer's time).
	bad := func(what string, xs ...float64) {
		for i, x := range xs {
			if !finite(x) {
				t.Fatalf("Ready state (T=%v, p=%d, S=%v, rcond=%v): %s[%d] = %v", st.Weight(), st.Params(), st.RSS(), st.RCond(), what, i, x)
			}
		}
	}
	bad("Forecast", fc.Forecast...)
	bad("CumForecast", fc.CumForecast...)
	th, err := st.Theta()
	if err != nil {
		t.Fatalf("Ready state: Theta: %v", err)
	}
	bad("theta", th...)
	sl, err := st.Slope()
	if err != nil {
		t.Fatalf("Ready state: Slope: %v", err)
	}
	bad("slope", sl.Level, sl.Slope)
	if fc.DF <= 0 {
		return
	}
	bad("Sigma", fc.Sigma)
	// An interval may be infinite, never NaN: after a gap long enough that
	// the two factors' discounts differ by more than a float64 holds, the
	// variance factor x^T F^-1 x overflows (the state knows nothing of the
	// future any more), and the bounds are then +-Inf (stored as NULL).
	noNaN := func(what string, xs ...float64) {
		for i, x := range xs {
			if math.IsNaN(x) || math.IsInf(x, -1) {
				t.Fatalf("Ready state (T=%v, p=%d, S=%v, rcond=%v): %s[%d] = %v", st.Weight(), st.Params(), st.RSS(), st.RCond(), what, i, x)
			}
		}
	}
	if math.IsInf(fc.SE[0], 1) {
		noNaN("SE", fc.SE...)
		noNaN("CumSE", fc.CumSE...)
		return
	}
	bad("SE", fc.SE...)
	bad("CumSE", fc.CumSE...)
	if st.Spec().Degree >= 1 {
		bad("slope SE", sl.SE)
	}
	if math.IsNaN(fc.T95) && math.IsNaN(fc.T80) && fc.DF < 0.01 {
		// No interval: the t quantile overflows below df = 0.0065.
		return
	}
	bad("T80, T95", fc.T80, fc.T95)
	bad("Lower80", fc.Lower80...)
	bad("Upper80", fc.Upper80...)
	bad("Lower95", fc.Lower95...)
	bad("Upper95", fc.Upper95...)
	bad("CumLower95", fc.CumLower95...)
	bad("CumUpper95", fc.CumUpper95...)
}
