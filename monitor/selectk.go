package monitor

// selectTop reorders keys/ids in place so that the k largest keys occupy
// keys[:k] (in no particular order). It is Hoare's quickselect (Hoare 1961,
// CACM 4(7), "Algorithm 65: FIND") with a median-of-three pivot; expected
// O(n), no allocation.
func selectTop(keys []float64, ids []int32, k int) {
	if len(keys) != len(ids) {
		panic("monitor: selectTop length mismatch")
	}
	lo, hi := 0, len(keys)-1
	if k <= 0 || k >= len(keys) {
		return
	}
	for lo < hi {
		// Median of three as pivot, moved to hi.
		mid := lo + (hi-lo)/2
		if keys[mid] < keys[lo] {
			swap2(keys, ids, mid, lo)
		}
		if keys[hi] < keys[lo] {
			swap2(keys, ids, hi, lo)
		}
		if keys[mid] < keys[hi] {
			swap2(keys, ids, mid, hi)
		}
		pivot := keys[hi]
		// Partition descending: elements > pivot go left.
		i := lo
		for j := lo; j < hi; j++ {
			if keys[j] > pivot {
				swap2(keys, ids, i, j)
				i++
			}
		}
		swap2(keys, ids, i, hi)
		// Fast exit on long runs of equal keys (ties are common: streams
		// zeroed in the same frame share one key).
		e := i + 1
		for e <= hi && keys[e] == pivot {
			e++
		}
		switch {
		case k <= i:
			hi = i - 1
		case k <= e:
			return
		default:
			lo = e
		}
	}
}

func swap2(keys []float64, ids []int32, a, b int) {
	keys[a], keys[b] = keys[b], keys[a]
	ids[a], ids[b] = ids[b], ids[a]
}
