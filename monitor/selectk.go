package monitor

// selectTop reorders keys/ids in place so that the k largest keys occupy
// keys[:k] (in no particular order). It is Hoare's quickselect (Hoare 1961,
// CACM 4(7), "Algorithm 65: FIND") with a median-of-three pivot and a
// three-way partition (Dijkstra's Dutch national flag), so the long runs of
// equal keys we see — streams zeroed in the same frame share one key — cost
// O(n), not O(n^2). Expected O(n), no allocation.
func selectTop(keys []float64, ids []int32, k int) {
	if len(keys) != len(ids) {
		panic("monitor: selectTop length mismatch")
	}
	lo, hi := 0, len(keys)-1
	if k <= 0 || k >= len(keys) {
		return
	}
	for lo < hi {
		mid := lo + (hi-lo)/2
		a, b, c := keys[lo], keys[mid], keys[hi]
		pivot := max(min(a, b), min(max(a, b), c)) // median of three
		// Partition descending: [lo,gt) > pivot, [gt,i) == pivot, (lt,hi] < pivot.
		gt, i, lt := lo, lo, hi
		for i <= lt {
			switch v := keys[i]; {
			case v > pivot:
				swap2(keys, ids, gt, i)
				gt++
				i++
			case v < pivot:
				swap2(keys, ids, i, lt)
				lt--
			default:
				i++
			}
		}
		switch {
		case k < gt:
			hi = gt - 1
		case k <= i:
			return // keys[:k] = everything > pivot plus some == pivot
		default:
			lo = i
		}
	}
}

func swap2(keys []float64, ids []int32, a, b int) {
	keys[a], keys[b] = keys[b], keys[a]
	ids[a], ids[b] = ids[b], ids[a]
}
