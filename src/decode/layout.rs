//! The layout of a TIFF or BigTIFF file: byte order and field widths, read
//! from its first four bytes (TIFF 6.0 section 2; BigTIFF: 8-byte counts and
//! offsets, 20-byte directory entries). Shared by the first-directory check
//! (`tiff.rs`) and the walker of growing stacks (`stack.rs`).
//!
//! What this file leaves to others: reading the file (its callers) and what
//! the values mean.

/// Byte order and classic or BigTIFF field widths.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct Layout {
    little: bool,
    big: bool,
}

impl Layout {
    /// The layout the signature in `head` announces; `None` when `head` does
    /// not start with a TIFF or BigTIFF signature.
    pub(super) fn of(head: &[u8]) -> Option<Layout> {
        let (little, big) = match head.get(..4)? {
            [b'I', b'I', 42, 0] => (true, false),
            [b'M', b'M', 0, 42] => (false, false),
            [b'I', b'I', 43, 0] => (true, true),
            [b'M', b'M', 0, 43] => (false, true),
            _ => return None,
        };
        Some(Layout { little, big })
    }

    /// Bytes of the header, the first directory's offset included.
    pub(super) fn header_len(self) -> usize {
        if self.big {
            16
        } else {
            8
        }
    }

    /// Bytes of an offset (the header's, a directory's next-directory field,
    /// an entry's value field).
    pub(super) fn offset_len(self) -> usize {
        if self.big {
            8
        } else {
            4
        }
    }

    /// Bytes of a directory's entry count.
    pub(super) fn count_len(self) -> usize {
        if self.big {
            8
        } else {
            2
        }
    }

    /// Bytes of one directory entry.
    pub(super) fn entry_len(self) -> usize {
        if self.big {
            20
        } else {
            12
        }
    }

    /// The unsigned integer in `b` (2, 4 or 8 bytes; other lengths read the
    /// first 8, padded with zeros) in the file's byte order.
    pub(super) fn uint(self, b: &[u8]) -> u64 {
        match b.len() {
            2 => {
                let a = [b[0], b[1]];
                u64::from(if self.little {
                    u16::from_le_bytes(a)
                } else {
                    u16::from_be_bytes(a)
                })
            }
            4 => {
                let a = [b[0], b[1], b[2], b[3]];
                u64::from(if self.little {
                    u32::from_le_bytes(a)
                } else {
                    u32::from_be_bytes(a)
                })
            }
            _ => {
                let mut a = [0u8; 8];
                let n = b.len().min(8);
                a[..n].copy_from_slice(&b[..n]);
                if self.little {
                    u64::from_le_bytes(a)
                } else {
                    u64::from_be_bytes(a)
                }
            }
        }
    }

    /// A directory entry's tag, field type, value count and the bytes of its
    /// value field (the value itself when it fits, else its offset).
    pub(super) fn entry(self, e: &[u8]) -> (u16, u16, u64, &[u8]) {
        let tag = self.uint(&e[0..2]) as u16;
        let kind = self.uint(&e[2..4]) as u16;
        if self.big {
            (tag, kind, self.uint(&e[4..12]), &e[12..20])
        } else {
            (tag, kind, self.uint(&e[4..8]), &e[8..12])
        }
    }
}

/// Bytes of one value of TIFF field type `kind`; `None` for types unknown to
/// TIFF 6.0 and BigTIFF (readers skip such entries).
pub(super) fn type_size(kind: u16) -> Option<u64> {
    match kind {
        1 | 2 | 6 | 7 => Some(1),
        3 | 8 => Some(2),
        4 | 9 | 11 | 13 => Some(4),
        5 | 10 | 12 | 16..=18 => Some(8),
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn byte_orders_and_widths_follow_the_signature() {
        let le = Layout::of(b"II*\0").unwrap();
        let be = Layout::of(b"MM\0*").unwrap();
        let big = Layout::of(b"II+\0").unwrap();
        assert_eq!(Layout::of(b"\x89PNG"), None);
        assert_eq!(Layout::of(b"II"), None, "too short to tell");
        assert_eq!(le.uint(&[1, 2]), 0x0201);
        assert_eq!(be.uint(&[1, 2]), 0x0102);
        assert_eq!(be.uint(&[0, 0, 1, 0]), 256);
        assert_eq!(big.uint(&[1, 0, 0, 0, 0, 0, 0, 1]), (1 << 56) + 1);
        assert_eq!(
            (le.header_len(), le.entry_len(), le.count_len()),
            (8, 12, 2)
        );
        assert_eq!(
            (big.header_len(), big.entry_len(), big.count_len()),
            (16, 20, 8)
        );
        // StripOffsets (273), LONG, 1 value, 8: classic little-endian entry.
        let entry = [0x11, 0x01, 4, 0, 1, 0, 0, 0, 8, 0, 0, 0];
        assert_eq!(le.entry(&entry), (273, 4, 1, &entry[8..12]));
        assert_eq!(type_size(16), Some(8), "LONG8 (BigTIFF)");
        assert_eq!(type_size(14), None);
    }
}
