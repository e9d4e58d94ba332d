package livetables

import (
	"math/big"
	"sort"
)

// Domain is what the conditions let one parameter column be: everything,
// a finite set (strings or exact numbers), or an interval of numbers with
// ends open, closed or absent.
//
// A domain is always a superset of the values that can satisfy the
// conditions, never exact: the query runs over the computed rows anyway.
type Domain struct {
	All      bool
	Interval bool
	Strs     []string   // finite set of a text column, sorted
	Nums     []*big.Rat // finite set of a numeric column, sorted
	Lo, Hi   *big.Rat   // interval ends, nil when absent
	LoInc    bool
	HiInc    bool
}

// Everything is the domain of a column the conditions do not narrow.
var Everything = Domain{All: true}

// Empty reports a domain no value is in.
func (d Domain) Empty() bool { return !d.All && !d.Interval && len(d.Strs) == 0 && len(d.Nums) == 0 }

// Domain algebra.

// Intersect is the domain of both conditions.
func Intersect(a, b Domain) Domain {
	switch {
	case a.All:
		return b
	case b.All:
		return a
	case a.Empty() || b.Empty():
		return Domain{}
	case a.Strs != nil || b.Strs != nil:
		var out []string
		for _, s := range a.Strs {
			if containsString(b.Strs, s) {
				out = append(out, s)
			}
		}
		return Domain{Strs: out}
	case a.Interval && b.Interval:
		d := a
		if b.Lo != nil && (d.Lo == nil || b.Lo.Cmp(d.Lo) > 0 || b.Lo.Cmp(d.Lo) == 0 && !b.LoInc) {
			d.Lo, d.LoInc = b.Lo, b.LoInc
		}
		if b.Hi != nil && (d.Hi == nil || b.Hi.Cmp(d.Hi) < 0 || b.Hi.Cmp(d.Hi) == 0 && !b.HiInc) {
			d.Hi, d.HiInc = b.Hi, b.HiInc
		}
		if d.Lo != nil && d.Hi != nil {
			if c := d.Lo.Cmp(d.Hi); c > 0 || c == 0 && !(d.LoInc && d.HiInc) {
				return Domain{}
			}
		}
		return d
	case a.Interval:
		return Domain{Nums: filterPoints(b.Nums, a)}
	case b.Interval:
		return Domain{Nums: filterPoints(a.Nums, b)}
	}
	return Domain{Nums: filterPoints(a.Nums, Domain{Nums: b.Nums})}
}

// Union is the domain of either condition (the hull of two intervals).
func Union(a, b Domain) Domain {
	switch {
	case a.All || b.All:
		return Everything
	case a.Empty():
		return b
	case b.Empty():
		return a
	case a.Strs != nil || b.Strs != nil:
		out := append(append([]string(nil), a.Strs...), b.Strs...)
		sort.Strings(out)
		return Domain{Strs: compactStrings(out)}
	case !a.Interval && !b.Interval:
		all := append(append([]*big.Rat(nil), a.Nums...), b.Nums...)
		sort.Slice(all, func(i, j int) bool { return all[i].Cmp(all[j]) < 0 })
		var out []*big.Rat
		for i, r := range all {
			if i == 0 || r.Cmp(all[i-1]) != 0 {
				out = append(out, r)
			}
		}
		return Domain{Nums: out}
	}
	// The hull of the two.
	ia, ib := hull(a), hull(b)
	d := Domain{Interval: true}
	if ia.Lo != nil && ib.Lo != nil {
		d.Lo, d.LoInc = ia.Lo, ia.LoInc
		if c := ib.Lo.Cmp(ia.Lo); c < 0 || c == 0 && ib.LoInc {
			d.Lo, d.LoInc = ib.Lo, ib.LoInc
		}
	}
	if ia.Hi != nil && ib.Hi != nil {
		d.Hi, d.HiInc = ia.Hi, ia.HiInc
		if c := ib.Hi.Cmp(ia.Hi); c > 0 || c == 0 && ib.HiInc {
			d.Hi, d.HiInc = ib.Hi, ib.HiInc
		}
	}
	return d
}

func compactStrings(s []string) []string {
	out := s[:0]
	for i, x := range s {
		if i == 0 || x != s[i-1] {
			out = append(out, x)
		}
	}
	return out
}

// hull is the closed hull of a non-empty finite set, or the interval.
func hull(d Domain) Domain {
	if d.Interval {
		return d
	}
	return Domain{Interval: true, Lo: d.Nums[0], Hi: d.Nums[len(d.Nums)-1], LoInc: true, HiInc: true}
}

// filterPoints keeps the points inside an interval, or in a finite set.
func filterPoints(pts []*big.Rat, in Domain) []*big.Rat {
	out := []*big.Rat{}
	for _, r := range pts {
		if in.Contains(r) {
			out = append(out, r)
		}
	}
	return out
}

func (d Domain) Contains(r *big.Rat) bool {
	if !d.Interval {
		i := sort.Search(len(d.Nums), func(i int) bool { return d.Nums[i].Cmp(r) >= 0 })
		return i < len(d.Nums) && d.Nums[i].Cmp(r) == 0
	}
	if d.Lo != nil {
		if c := r.Cmp(d.Lo); c < 0 || c == 0 && !d.LoInc {
			return false
		}
	}
	if d.Hi != nil {
		if c := r.Cmp(d.Hi); c > 0 || c == 0 && !d.HiInc {
			return false
		}
	}
	return true
}

func containsString(sorted []string, s string) bool {
	i := sort.SearchStrings(sorted, s)
	return i < len(sorted) && sorted[i] == s
}

// textSet returns the finite set of strings a text Domain allows.
func (d Domain) TextSet() ([]string, bool) {
	if d.All {
		return nil, false
	}
	return d.Strs, true
}
