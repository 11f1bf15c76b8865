package alarms

// Decimal numbers read from trend CSV cells: an exact fast path for the
// numbers the project writes, strconv for anything else.

import "strconv"

// pow10 holds the powers of ten that float64 represents exactly.
var pow10 = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10,
	1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// parseFloat parses a decimal number like strconv.ParseFloat(string(b), 64)
// and gives the same result. The numbers the project writes (at most 15
// significant digits, 'f' or 'g' format) take the exact fast path: a
// mantissa below 2^53 times or divided by an exactly representable power of
// ten is one correctly rounded operation (Clinger 1990, "How to read
// floating point numbers accurately"). Anything else goes to strconv.
func parseFloat(b []byte) (float64, bool) {
	if v, ok := parseFloatFast(b); ok {
		return v, true
	}
	v, err := strconv.ParseFloat(string(b), 64)
	return v, err == nil
}

func parseFloatFast(b []byte) (float64, bool) {
	i, n := 0, len(b)
	neg := false
	if i < n && (b[i] == '-' || b[i] == '+') {
		neg = b[i] == '-'
		i++
	}
	var mant uint64
	digits, frac, exp := 0, 0, 0
	sawDigit, sawDot := false, false
	for ; i < n; i++ {
		c := b[i]
		switch {
		case c >= '0' && c <= '9':
			sawDigit = true
			if mant == 0 && c == '0' {
				if sawDot {
					frac++
				}
				continue
			}
			if digits >= 19 {
				return 0, false
			}
			mant = mant*10 + uint64(c-'0')
			digits++
			if sawDot {
				frac++
			}
			continue
		case c == '.' && !sawDot:
			sawDot = true
			continue
		}
		break
	}
	if !sawDigit {
		return 0, false
	}
	if i < n {
		if b[i] != 'e' && b[i] != 'E' {
			return 0, false
		}
		var ok bool
		if exp, ok = parseExponent(b[i+1:]); !ok {
			return 0, false
		}
	}
	if mant > 1<<53 {
		return 0, false
	}
	e := exp - frac
	f := float64(mant)
	switch {
	case mant == 0:
	case e == 0:
	case e > 0 && e <= 22:
		f *= pow10[e]
	case e < 0 && e >= -22:
		f /= pow10[-e]
	default:
		return 0, false
	}
	if neg {
		f = -f
	}
	return f, true
}

// parseExponent parses the signed decimal exponent after the 'e' of a
// number; it refuses an empty one and stops at a magnitude above 1000.
func parseExponent(b []byte) (int, bool) {
	i, n := 0, len(b)
	neg := false
	if i < n && (b[i] == '-' || b[i] == '+') {
		neg = b[i] == '-'
		i++
	}
	if i == n {
		return 0, false
	}
	exp := 0
	for ; i < n; i++ {
		c := b[i]
		if c < '0' || c > '9' || exp > 1000 {
			return 0, false
		}
		exp = exp*10 + int(c-'0')
	}
	if neg {
		exp = -exp
	}
	return exp, true
}
