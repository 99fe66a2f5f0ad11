package redistest

import "strings"

// CRC16 is the CRC-16/XMODEM checksum (polynomial 0x1021, initial value 0,
// no reflection) that Redis Cluster hashes keys with, computed bit by bit
// from its definition, for tests that check where keys land.
func CRC16(b []byte) uint16 {
	var crc uint16
	for _, c := range b {
		crc ^= uint16(c) << 8
		for range 8 {
			if crc&0x8000 != 0 {
				crc = crc<<1 ^ 0x1021
			} else {
				crc <<= 1
			}
		}
	}
	return crc
}

// KeySlot is HASH_SLOT = CRC16(key) mod 16384, where only the part between
// the first "{" and the next "}" is hashed when that part is not empty.
// Source: Redis Cluster specification, sections "Keys distribution model"
// and "Hash tags" (recalled from memory).
func KeySlot(key string) int {
	if i := strings.IndexByte(key, '{'); i >= 0 {
		if j := strings.IndexByte(key[i+1:], '}'); j > 0 {
			key = key[i+1 : i+1+j]
		}
	}
	return int(CRC16([]byte(key))) % ClusterSlots
}
