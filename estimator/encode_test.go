package estimator

import (
	"bytes"
	"encoding/binary"
	"encoding/hex"
	"errors"
	"hash/crc32"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
)

// encodeSpecs are models of every shape: each degree, integer and
// non-integer periods, a cosine-only harmonic at period/2, a burn-in.
var encodeSpecs = []Spec{
	{Degree: 0, Lambda: 0.9},
	{Degree: 1, Lambda: 0.97},
	{Degree: 2, Lambda: 1},
	{Degree: 3, Lambda: 0.95, BurnIn: 4},
	{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.98},
	{Degree: 1, Period: 4, Harmonics: 2, Lambda: 0.9},
	{Degree: 0, Period: 365.25 / 7, Harmonics: 3, Lambda: 0.99, BurnIn: 10},
	{Degree: 2, Period: 12, Harmonics: 6, Lambda: 0.995},
	{Degree: 1, Period: 12, Harmonics: 3, Lambda: 0.8, SeasonLambda: 0.99},
	{Degree: 0, Period: 7, Harmonics: 2, Lambda: 0.99, SeasonLambda: 0.7, BurnIn: 2},
}

// randomState builds a state of a random spec from a random series with
// gaps, anywhere from empty to well past Ready.
func randomState(t testing.TB, rng *rand.Rand) *State {
	spec := encodeSpecs[rng.IntN(len(encodeSpecs))]
	st, err := NewState(spec)
	if err != nil {
		t.Fatal(err)
	}
	n := rng.IntN(120)
	scale := math.Pow(10, float64(rng.IntN(7)-3)) // values from 1e-3 to 1e3
	for i := 0; i < n; i++ {
		if rng.Float64() < 0.15 {
			if err := st.Skip(1 + rng.IntN(5)); err != nil {
				t.Fatal(err)
			}
			continue
		}
		if _, err := st.Observe(scale * (10 + float64(i%7) + rng.NormFloat64())); err != nil {
			t.Fatal(err)
		}
	}
	return st
}

func mustMarshal(t testing.TB, st *State) []byte {
	t.Helper()
	b, err := st.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// sameBits reports whether two float slices are equal bit for bit (NaN
// payloads included).
func sameBits(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// answers gathers every query result of a state as float bits, so that
// two states can be compared exactly.
func answers(st *State) []float64 {
	out := []float64{st.Weight(), st.RSS(), st.RCond(), st.DF(), st.Sigma(), float64(st.Count()), float64(st.Steps())}
	if st.Ready() {
		out = append(out, 1)
		th, _ := st.Theta()
		out = append(out, th...)
		fc, _ := st.Forecast(12)
		for _, s := range [][]float64{fc.Forecast, fc.SE, fc.Lower80, fc.Upper80, fc.Lower95, fc.Upper95, fc.CumForecast, fc.CumSE, fc.CumLower95, fc.CumUpper95} {
			out = append(out, s...)
		}
		out = append(out, fc.Sigma, fc.DF, fc.T80, fc.T95)
		sl, _ := st.Slope()
		out = append(out, sl.Level, sl.Slope, sl.SE, sl.DF)
	}
	es := st.Errors()
	out = append(out, float64(es.N), es.MAE, es.RMSE, es.Bias, es.MAPE, float64(es.NAPE), float64(es.NInt),
		float64(es.In80), float64(es.In95), es.Cov80, es.Cov95, es.DiscMAE, es.DiscRMSE)
	return out
}

// TestEncodeRoundTrip: encode, decode, encode again gives the same bytes;
// the decoded state answers every query with the same bits, and keeps
// doing so as both take the same further updates.
func TestEncodeRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	n := 400
	if testing.Short() {
		n = 100
	}
	ready := 0
	for i := 0; i < n; i++ {
		st := randomState(t, rng)
		b1 := mustMarshal(t, st)
		dec, err := UnmarshalState(b1)
		if err != nil {
			t.Fatalf("state %d (%v): %v", i, st.Spec(), err)
		}
		if b2 := mustMarshal(t, dec); !bytes.Equal(b1, b2) {
			t.Fatalf("state %d (%v): re-encoding differs", i, st.Spec())
		}
		if dec.Spec() != st.Spec() || dec.Ready() != st.Ready() {
			t.Fatalf("state %d: decoded spec/readiness differ", i)
		}
		if st.Ready() {
			ready++
		}
		if !sameBits(answers(st), answers(dec)) {
			t.Fatalf("state %d (%v): decoded state answers differently", i, st.Spec())
		}
		for k := 0; k < 5; k++ {
			y := 10 + rng.NormFloat64()
			s1, err1 := st.Observe(y)
			s2, err2 := dec.Observe(y)
			if (err1 == nil) != (err2 == nil) || !sameStep(s1, s2) {
				t.Fatalf("state %d: update %d differs after decoding: %+v / %+v", i, k, s1, s2)
			}
		}
		if !sameBits(answers(st), answers(dec)) {
			t.Fatalf("state %d (%v): decoded state drifts after updates", i, st.Spec())
		}
		if !bytes.Equal(mustMarshal(t, st), mustMarshal(t, dec)) {
			t.Fatalf("state %d: encodings differ after the same updates", i)
		}
	}
	if ready < n/3 {
		t.Errorf("only %d of %d random states were Ready", ready, n)
	}
}

// withCRC replaces the trailing CRC-32C of an encoding, so that a test can
// alter a field and still get past the checksum.
func withCRC(b []byte) []byte {
	b = append([]byte(nil), b...)
	if len(b) < 4 {
		return b
	}
	body := b[:len(b)-4]
	binary.LittleEndian.PutUint32(b[len(b)-4:], crc32.Checksum(body, crc32.MakeTable(crc32.Castagnoli)))
	return b
}

func TestDecodeErrors(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	spec := Spec{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.98, BurnIn: 3}
	st, err := NewState(spec)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 50; i++ {
		if _, err := st.Observe(100 + rng.NormFloat64()); err != nil {
			t.Fatal(err)
		}
	}
	good := mustMarshal(t, st)
	if _, err := DecodeFor(good, spec); err != nil {
		t.Fatalf("DecodeFor with the same spec: %v", err)
	}

	t.Run("corrupt byte", func(t *testing.T) {
		// CRC-32C detects every error confined to one byte (any CRC of
		// degree 32 detects all bursts of length <= 32; Koopman 2002).
		for i := range good {
			for _, flip := range []byte{0x01, 0x80, 0xff} {
				b := append([]byte(nil), good...)
				b[i] ^= flip
				if _, err := UnmarshalState(b); !errors.Is(err, ErrCorrupt) {
					t.Fatalf("byte %d ^ %#x: err = %v, want ErrCorrupt", i, flip, err)
				}
			}
		}
	})
	t.Run("truncated", func(t *testing.T) {
		for n := 0; n < len(good); n++ {
			if _, err := UnmarshalState(good[:n]); !errors.Is(err, ErrCorrupt) {
				t.Fatalf("first %d of %d bytes: err = %v, want ErrCorrupt", n, len(good), err)
			}
		}
		if _, err := UnmarshalState(append(append([]byte(nil), good...), 0)); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("one byte too many: err = %v, want ErrCorrupt", err)
		}
	})
	t.Run("wrong version", func(t *testing.T) {
		for _, v := range []byte{0, 3, 255} {
			b := append([]byte(nil), good...)
			b[3] = v
			_, err := UnmarshalState(withCRC(b))
			if !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "version") {
				t.Fatalf("version %d: err = %v, want ErrCorrupt naming the version", v, err)
			}
		}
	})
	t.Run("impossible values", func(t *testing.T) {
		// Offsets from the layout comment in encode.go: magic+version 4,
		// degree 1, harmonics 1, burn-in 4, period 8, lambda 8, seasonal
		// lambda 8, n 8, steps 8, then T at 50.
		const offT = 4 + 1 + 1 + 4 + 8 + 8 + 8 + 8 + 8
		for _, bad := range []float64{-1, math.NaN(), math.Inf(1)} {
			b := append([]byte(nil), good...)
			binary.LittleEndian.PutUint64(b[offT:], math.Float64bits(bad))
			if _, err := UnmarshalState(withCRC(b)); !errors.Is(err, ErrCorrupt) {
				t.Fatalf("T = %v: err = %v, want ErrCorrupt", bad, err)
			}
		}
		// Lambda 1.3 in the header: the spec check rejects it.
		b := append([]byte(nil), good...)
		binary.LittleEndian.PutUint64(b[4+1+1+4+8:], math.Float64bits(1.3))
		if _, err := UnmarshalState(withCRC(b)); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("lambda 1.3: err = %v, want ErrCorrupt", err)
		}
	})
	t.Run("spec mismatch", func(t *testing.T) {
		for _, want := range []Spec{
			{Degree: 2, Period: 7, Harmonics: 2, Lambda: 0.98, BurnIn: 3},
			{Degree: 1, Period: 7, Harmonics: 1, Lambda: 0.98, BurnIn: 3},
			{Degree: 1, Period: 7.5, Harmonics: 2, Lambda: 0.98, BurnIn: 3},
			{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.97, BurnIn: 3},
			{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.98, BurnIn: 0},
		} {
			_, err := DecodeFor(good, want)
			if err == nil {
				t.Fatalf("DecodeFor(%v) of a %v state: no error", want, spec)
			}
			if errors.Is(err, ErrCorrupt) {
				t.Fatalf("DecodeFor(%v): a mismatch is not corruption: %v", want, err)
			}
		}
	})
}

// sameStep compares two steps bit for bit. Lower95/Upper95 may be NaN on one side
// only: the decoded state starts with an empty quantile cache, and without
// a cached quantile the interval bounds are left out for an actual inside
// them (see Step).
func sameStep(a, b Step) bool {
	eq := func(x, y float64) bool { return math.Float64bits(x) == math.Float64bits(y) }
	opt := func(x, y float64) bool { return math.IsNaN(x) || math.IsNaN(y) || eq(x, y) }
	return a.Scored == b.Scored && eq(a.Forecast, b.Forecast) && eq(a.Err, b.Err) && eq(a.SE, b.SE) &&
		a.In80 == b.In80 && a.In95 == b.In95 && opt(a.Lower95, b.Lower95) && opt(a.Upper95, b.Upper95)
}

// TestDecodeVersion1 decodes a state written by the encoder before seasonal
// lambdas existed (encoding version 1, commit 7d2191c): the program below,
// run against that commit's estimator, printed the hex and the numbers.
//
//	st, _ := NewState(Spec{Degree: 1, Period: 12, Harmonics: 2, Lambda: 0.95, BurnIn: 2})
//	for i := 0; i < 40; i++ {
//		if i == 20 { st.Skip(3) }
//		st.Observe(float64(i) + 3*float64(i%12) + float64(i*i%7)/10)
//	}
//	b, _ := st.MarshalBinary(); fc, _ := st.Forecast(3)
//	fmt.Printf("%.17g %.17g %.17g", fc.Forecast, fc.SE, st.Sigma())
func TestDecodeVersion1(t *testing.T) {
	const v1 = "737453010102020000000000000000002840666666666666ee3f28000000000000002b00000000000000428f50eb14c63040f299c6478e94904038234397863ce0404c8d5734bf148640066113c0be69bdc07835dd5cccd757c0b4c5b9cfee3d3cc025548efa58650fc02d48d579ed155340428f50eb14c63040ec8c8dcfe0bd6bc05cc024fe8ec5b340691285b77ef207c0a6ef85410b4f3d40901e938d57fa1e4001f9d034e979e53f8219539e312416409e5c1c723777d7bf3e8fd70ffe0e2240a05c1c723777e7bf9b59ac1099b210c0d3cd199b2d24be3f9f2de7f549aef9bf4a8e01ec40332040bbff6f48928ef43f28e9b5ed0b352fc030f72279b336f63f2ebf6d8163b5e13fedfe52055f41c2bf3d909feae85821402000000000000000200000000000000020000000000000001c000000000000001e0000000000000046138091ae906f4018a543e0bb92b040b9abfb5cfbad52c0a49caf4313552140dbb63ed39a23604046bd05f1f4ee9d409fecf09fbe4f2f407b019714"
	b, err := hex.DecodeString(v1)
	if err != nil {
		t.Fatal(err)
	}
	spec := Spec{Degree: 1, Period: 12, Harmonics: 2, Lambda: 0.95, BurnIn: 2}
	st, err := DecodeFor(b, spec)
	if err != nil {
		t.Fatalf("version 1 state: %v", err)
	}
	fc, err := st.Forecast(3)
	if err != nil {
		t.Fatal(err)
	}
	// The values the version-1 build printed for this state.
	wantF := []float64{57.223440633995807, 60.638109252220495, 61.714312773177184}
	for i, w := range wantF {
		if fc.Forecast[i] != w {
			t.Errorf("forecast %d = %.17g, want %.17g", i+1, fc.Forecast[i], w)
		}
	}
	if got := st.Sigma(); got != 9.9243608116996658 {
		t.Errorf("sigma = %.17g, want 9.9243608116996658", got)
	}
	// Re-encoded, it is a version 2 state that decodes to the same.
	b2 := mustMarshal(t, st)
	if b2[3] != encodingVersion {
		t.Fatalf("re-encoded as version %d", b2[3])
	}
	st2, err := DecodeFor(b2, spec)
	if err != nil {
		t.Fatal(err)
	}
	if st2.Sigma() != st.Sigma() {
		t.Fatalf("re-encoded sigma %v, want %v", st2.Sigma(), st.Sigma())
	}
}
