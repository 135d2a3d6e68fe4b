package analysis

import (
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"math/big"
	"math/bits"
	"strings"
)

// Sum is an exact, order-independent accumulator of float64 values: a signed
// 256-bit fixed-point number with 128 fractional bits, plus flags for NaN and
// infinities. Adding the same values in any order, or adding them into
// several Sums and merging those, gives the same state bit for bit, so a
// sharded run and a single run agree exactly.
//
// Each value is converted to fixed point before it is added: values are exact
// when they are multiples of 2^-128 with magnitude below 2^64 (every finite
// float64 of magnitude at least 2^-75 is); the bits of a value below 2^-128
// are truncated toward zero, which is deterministic and so keeps the
// associativity. A value of magnitude 2^64 or more counts as an infinity of
// its sign. The zero value is an empty sum.
type Sum struct {
	w    [4]uint64 // little-endian limbs, two's complement
	flag sumFlag
}

type sumFlag uint8

const (
	flagPosInf sumFlag = 1 << iota
	flagNegInf
	flagNaN
)

// Add adds x to the sum.
func (s *Sum) Add(x float64) {
	if x == 0 {
		return
	}
	defer s.canon()
	b := math.Float64bits(x)
	exp := int(b>>52) & 0x7ff
	neg := b>>63 != 0
	if exp == 0x7ff {
		switch {
		case b&(1<<52-1) != 0:
			s.flag |= flagNaN
		case neg:
			s.flag |= flagNegInf
		default:
			s.flag |= flagPosInf
		}
		return
	}
	mant := b & (1<<52 - 1)
	if exp == 0 {
		exp = 1
	} else {
		mant |= 1 << 52
	}
	// x = mant * 2^(exp-1075); bit 0 of mant lands at fixed-point bit shift.
	shift := exp - 1075 + 128
	if shift < 0 {
		if shift <= -53 {
			return
		}
		mant >>= uint(-shift)
		shift = 0
	}
	if shift+53 > 192 { // |x| >= 2^64
		if neg {
			s.flag |= flagNegInf
		} else {
			s.flag |= flagPosInf
		}
		return
	}
	var v [4]uint64
	limb, off := shift/64, uint(shift%64)
	v[limb] = mant << off
	if off > 0 && limb+1 < 4 {
		v[limb+1] = mant >> (64 - off)
	}
	if neg {
		s.sub(&v)
	} else {
		s.add(&v)
	}
}

// add adds v to the 256-bit word, carrying from the low limb up (mod 2^256).
func (s *Sum) add(v *[4]uint64) { s.addSub(v, bits.Add64) }

// sub subtracts v from the 256-bit word, borrowing from the low limb up.
func (s *Sum) sub(v *[4]uint64) { s.addSub(v, bits.Sub64) }

// addSub applies op (bits.Add64 or bits.Sub64) limb by limb, the carry or
// borrow of each going into the next.
func (s *Sum) addSub(v *[4]uint64, op func(x, y, c uint64) (uint64, uint64)) {
	var c uint64
	for i := range s.w {
		s.w[i], c = op(s.w[i], v[i], c)
	}
}

// Merge adds the state of o to s.
func (s *Sum) Merge(o Sum) {
	s.add(&o.w)
	s.flag |= o.flag
	s.canon()
}

// canon keeps one representation per value: once a sum is not finite its
// limbs no longer matter and are cleared, and +Inf with -Inf is NaN.
func (s *Sum) canon() {
	if s.flag == 0 {
		return
	}
	if s.flag&flagNaN != 0 || s.flag&(flagPosInf|flagNegInf) == flagPosInf|flagNegInf {
		s.flag = flagNaN
	}
	s.w = [4]uint64{}
}

// Float64 returns the sum rounded to the nearest float64 (ties to even):
// NaN when a NaN was added or both infinities were, ±Inf when one was.
func (s Sum) Float64() float64 {
	switch {
	case s.flag&flagNaN != 0 || s.flag == flagPosInf|flagNegInf:
		return math.NaN()
	case s.flag == flagPosInf:
		return math.Inf(1)
	case s.flag == flagNegInf:
		return math.Inf(-1)
	}
	if s.w == [4]uint64{} {
		return 0
	}
	neg := s.w[3]>>63 != 0
	w := s.w
	if neg { // magnitude of a two's complement number
		var z Sum
		z.sub(&w)
		w = z.w
	}
	var buf [32]byte
	for i := 0; i < 4; i++ {
		for j := 0; j < 8; j++ {
			buf[31-(i*8+j)] = byte(w[i] >> (8 * j))
		}
	}
	n := new(big.Int).SetBytes(buf[:])
	f := new(big.Float).SetInt(n) // exact: precision grows to the bit length
	f.SetMantExp(f, -128)
	v, _ := f.Float64()
	if neg {
		v = -v
	}
	return v
}

// String returns the JSON text of the state (see MarshalJSON).
func (s Sum) String() string {
	switch {
	case s.flag&flagNaN != 0 || s.flag == flagPosInf|flagNegInf:
		return "nan"
	case s.flag == flagPosInf:
		return "+inf"
	case s.flag == flagNegInf:
		return "-inf"
	}
	var buf [32]byte
	for i := 0; i < 4; i++ {
		for j := 0; j < 8; j++ {
			buf[31-(i*8+j)] = byte(s.w[i] >> (8 * j))
		}
	}
	return hex.EncodeToString(buf[:])
}

// MarshalJSON writes the exact state as a string: 64 hexadecimal digits of
// the 256-bit two's complement fixed-point value (value = integer * 2^-128),
// or "nan", "+inf", "-inf".
func (s Sum) MarshalJSON() ([]byte, error) { return json.Marshal(s.String()) }

// UnmarshalJSON reads what MarshalJSON writes.
func (s *Sum) UnmarshalJSON(b []byte) error {
	var t string
	if err := json.Unmarshal(b, &t); err != nil {
		return fmt.Errorf("analysis: exact sum: %w", err)
	}
	*s = Sum{}
	switch t {
	case "nan":
		s.flag = flagNaN
		return nil
	case "+inf":
		s.flag = flagPosInf
		return nil
	case "-inf":
		s.flag = flagNegInf
		return nil
	}
	raw, err := hex.DecodeString(strings.TrimSpace(t))
	if err != nil || len(raw) != 32 {
		return fmt.Errorf("analysis: exact sum: want 64 hex digits, got %q", t)
	}
	for i := 0; i < 4; i++ {
		for j := 0; j < 8; j++ {
			s.w[i] |= uint64(raw[31-(i*8+j)]) << (8 * j)
		}
	}
	return nil
}
