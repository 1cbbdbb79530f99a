package frames

import "hash/crc32"

func crc32IEEE(b []byte) uint32 { return crc32.ChecksumIEEE(b) }
