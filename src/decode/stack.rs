//! The pages of a multi-page TIFF or BigTIFF file that is still being
//! written, found as they are completed, without reading the file again from
//! its start.
//!
//! A page is complete when its directory (entry count, entries, the
//! next-directory field) and every strip or tile it declares lie inside the
//! file ([`check_streams_inside`]), and so do the values its entries keep
//! elsewhere (the strip tables, a description). A writer that appends a page
//! writes the page and points the previous directory's next-directory field
//! at it, in either order: a pointer to bytes not yet written is a page not
//! yet complete. A writer may also point at the directory first, leave its
//! bytes unwritten (zeros, or a hole) while it writes the pixel data after
//! them, and fill the directory in last: so a directory is taken as written
//! only when its tags ascend from a non-zero first one (as TIFF 6.0 requires)
//! and it declares strips or tiles at non-zero offsets. A directory that never
//! becomes valid holds its stack at that page. A [`StackCursor`] remembers where the last complete page's
//! next-directory field is, so each look reads one field and the new pages'
//! directories only: the cost of an appended page does not grow with the
//! pages before it.
//!
//! What this file leaves to others: decoding a page's pixels (`tiff.rs`),
//! deciding when to look and what a page is (the watcher).

use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::Path;

use super::layout::{type_size, Layout};
use super::limits::{check_streams_inside, read_up_to, DecodeError};

/// One complete page of a stack.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StackPage {
    /// The page's place in the file's chain of directories, from 0.
    pub index: usize,
    /// The end of the bytes the page needs (its directory and its strips or
    /// tiles): fixed once the page is written, whatever is appended later.
    pub end: u64,
}

/// Where a growing stack was left at the last look.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StackCursor {
    layout: Layout,
    /// Where the offset of the next page's directory is kept: the header's
    /// field before the first page, then the last complete page's
    /// next-directory field.
    pointer_at: u64,
    /// Complete pages found so far.
    pages: usize,
    /// The largest end of a page found so far: a file shorter than that
    /// was rewritten, not appended to.
    end: u64,
}

/// Most bytes of a strip or tile table read for one page (two million
/// strips or tiles).
const TABLE_BUDGET: u64 = 16 << 20;

/// TIFF tags of the strip and tile tables (TIFF 6.0: StripOffsets,
/// StripByteCounts; TileOffsets, TileByteCounts).
const STRIP_OFFSETS: u16 = 273;
const STRIP_BYTE_COUNTS: u16 = 279;
const TILE_OFFSETS: u16 = 324;
const TILE_BYTE_COUNTS: u16 = 325;

impl StackCursor {
    /// A cursor before the first page of `path`; `Ok(None)` when the file is
    /// not a TIFF or BigTIFF file (a PNG has one frame, never a stack).
    ///
    /// # Errors
    /// [`DecodeError::Open`]; [`DecodeError::Empty`] or
    /// [`DecodeError::Truncated`] while the file is too short to hold a
    /// header (still being created).
    pub fn open(path: &Path) -> Result<Option<StackCursor>, DecodeError> {
        let (mut file, len) = open(path)?;
        let mut head = [0u8; 16];
        let n = read_up_to(&mut file, &mut head).map_err(io(path))?;
        if n < 4 {
            return Err(if n == 0 {
                DecodeError::Empty { path: path.into() }
            } else {
                DecodeError::Truncated {
                    path: path.into(),
                    detail: format!("only {len} bytes"),
                }
            });
        }
        Ok(Layout::of(&head[..n]).map(|layout| StackCursor {
            layout,
            pointer_at: (layout.header_len() - layout.offset_len()) as u64,
            pages: 0,
            end: layout.header_len() as u64,
        }))
    }

    /// Complete pages found so far.
    pub fn pages(&self) -> usize {
        self.pages
    }

    /// Reads on from the last complete page and returns the pages completed
    /// since, in order; stops at the first page not complete yet, or after
    /// `max_pages` pages in all.
    ///
    /// # Errors
    /// [`DecodeError::Open`]; [`DecodeError::Corrupt`] for a directory that
    /// cannot be a directory, or a file now shorter than the pages already
    /// found (rewritten: start again with a new cursor).
    pub fn advance(
        &mut self,
        path: &Path,
        max_pages: usize,
    ) -> Result<Vec<StackPage>, DecodeError> {
        let (file, len) = open(path)?;
        if len < self.end {
            return Err(DecodeError::Corrupt {
                path: path.into(),
                detail: format!(
                    "the file has {len} bytes, fewer than its {} pages already read took ({}): it was rewritten, not appended to",
                    self.pages, self.end
                ),
            });
        }
        let mut reader = BufReader::with_capacity(1 << 13, file);
        let mut found = Vec::new();
        while self.pages < max_pages {
            let Some(page) = self.next_page(&mut reader, path, len)? else {
                break;
            };
            found.push(page);
        }
        Ok(found)
    }

    /// The next page when it is complete.
    fn next_page<R: Read + Seek>(
        &mut self,
        reader: &mut R,
        path: &Path,
        len: u64,
    ) -> Result<Option<StackPage>, DecodeError> {
        let layout = self.layout;
        let Some(field) = read_at(reader, path, len, self.pointer_at, layout.offset_len())? else {
            return Ok(None);
        };
        let ifd = layout.uint(&field);
        if ifd == 0 {
            return Ok(None); // no further page yet
        }
        let corrupt = |detail: String| DecodeError::Corrupt {
            path: path.into(),
            detail: format!("page {}: {detail}", self.pages),
        };
        let Some(count) = read_at(reader, path, len, ifd, layout.count_len())? else {
            return Ok(None);
        };
        let entries = layout.uint(&count);
        let entries_len = entries
            .checked_mul(layout.entry_len() as u64)
            .filter(|&n| n <= len)
            .ok_or_else(|| corrupt(format!("its directory declares {entries} entries")))?;
        let body_len = entries_len + layout.offset_len() as u64;
        let Some(body) = read_at(
            reader,
            path,
            len,
            ifd + layout.count_len() as u64,
            body_len as usize,
        )?
        else {
            return Ok(None);
        };
        let ifd_end = ifd + layout.count_len() as u64 + body_len;
        let mut tables: [Vec<u64>; 4] = Default::default();
        let mut last_tag = 0u16;
        for entry in body[..entries_len as usize].chunks_exact(layout.entry_len()) {
            let (tag, kind, values, value) = layout.entry(entry);
            if tag <= last_tag {
                // Tags ascend (TIFF 6.0 section 2): zeros here are bytes a
                // writer has reserved for the directory but not written yet.
                return Ok(None);
            }
            last_tag = tag;
            let Some(size) = type_size(kind) else {
                continue;
            };
            let bytes = values.saturating_mul(size);
            let table = [
                STRIP_OFFSETS,
                STRIP_BYTE_COUNTS,
                TILE_OFFSETS,
                TILE_BYTE_COUNTS,
            ]
            .iter()
            .position(|&t| t == tag);
            let inline = bytes <= layout.offset_len() as u64;
            let data = if inline {
                value[..bytes as usize].to_vec()
            } else {
                let at = layout.uint(value);
                if at.checked_add(bytes).is_none_or(|end| end > len) {
                    return Ok(None); // a value not written yet
                }
                match table {
                    Some(_) if bytes > TABLE_BUDGET || !matches!(size, 2 | 4 | 8) => {
                        return Err(corrupt(format!("tag {tag} declares {values} values")))
                    }
                    Some(_) => match read_at(reader, path, len, at, bytes as usize)? {
                        Some(data) => data,
                        None => return Ok(None),
                    },
                    None => continue,
                }
            };
            if let Some(t) = table {
                tables[t] = data
                    .chunks_exact(size as usize)
                    .map(|v| layout.uint(v))
                    .collect();
            }
        }
        let [strip_offsets, strip_counts, tile_offsets, tile_counts] = &tables;
        let (what, offsets, counts) = if tile_offsets.is_empty() {
            ("strip", strip_offsets, strip_counts)
        } else {
            ("tile", tile_offsets, tile_counts)
        };
        if offsets.is_empty() || offsets.iter().zip(counts).any(|(&o, &c)| o == 0 && c > 0) {
            return Ok(None); // no pixel data declared yet
        }
        let end = match check_streams_inside(path, what, offsets, counts, len) {
            Ok(()) => offsets
                .iter()
                .zip(counts)
                .map(|(o, c)| o + c)
                .fold(ifd_end, u64::max),
            Err(e) if e.is_incomplete() => return Ok(None),
            // Complete as far as can be told: decoding it reports the fault.
            Err(_) => ifd_end,
        };
        let page = StackPage {
            index: self.pages,
            end,
        };
        self.pointer_at = ifd + layout.count_len() as u64 + entries_len;
        self.pages += 1;
        self.end = self.end.max(end);
        Ok(Some(page))
    }
}

fn io(path: &Path) -> impl Fn(std::io::Error) -> DecodeError + '_ {
    move |source| DecodeError::Open {
        path: path.into(),
        source,
    }
}

fn open(path: &Path) -> Result<(File, u64), DecodeError> {
    let file = File::open(path).map_err(io(path))?;
    let len = file.metadata().map_err(io(path))?.len();
    Ok((file, len))
}

/// The `n` bytes at `at`, or `None` when they are not all inside the file's
/// `len` bytes yet.
fn read_at<R: Read + Seek>(
    reader: &mut R,
    path: &Path,
    len: u64,
    at: u64,
    n: usize,
) -> Result<Option<Vec<u8>>, DecodeError> {
    if at.checked_add(n as u64).is_none_or(|end| end > len) {
        return Ok(None);
    }
    reader.seek(SeekFrom::Start(at)).map_err(io(path))?;
    let mut buf = vec![0u8; n];
    let got = read_up_to(reader, &mut buf).map_err(io(path))?;
    Ok((got == n).then_some(buf))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A classic little-endian directory of two entries, StripOffsets and
    /// StripByteCounts (LONG, one value each), and its next-directory field
    /// (TIFF 6.0 section 2): 2 + 2 × 12 + 4 = 30 bytes.
    fn directory(strip_at: u32, strip_len: u32, next: u32) -> Vec<u8> {
        let mut d = 2u16.to_le_bytes().to_vec();
        for (tag, value) in [(273u16, strip_at), (279, strip_len)] {
            d.extend(tag.to_le_bytes());
            d.extend(4u16.to_le_bytes());
            d.extend(1u32.to_le_bytes());
            d.extend(value.to_le_bytes());
        }
        d.extend(next.to_le_bytes());
        d
    }

    #[test]
    fn pages_are_found_once_their_directory_and_strips_are_written() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("stack.tif");
        // Header (8 bytes), page 0's directory at 8 (to 38), its 4-byte strip
        // at 38 (to 42); page 1's directory at 42 (to 72), its 6-byte strip
        // at 72 (to 78); page 0's next-directory field is bytes 34..38.
        let mut file = b"II*\0".to_vec();
        file.extend(8u32.to_le_bytes());
        file.extend(directory(38, 4, 0));
        file.extend([1, 2, 3, 4]);
        let write = |bytes: &[u8]| std::fs::write(&path, bytes).unwrap();

        write(&file[..41]);
        let mut cursor = StackCursor::open(&path).unwrap().expect("a TIFF");
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![],
            "strip not all there"
        );
        write(&file);
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![StackPage { index: 0, end: 42 }]
        );
        assert_eq!(cursor.advance(&path, 10).unwrap(), vec![], "nothing new");

        // Page 1 as a writer that reserves its directory first leaves it: the
        // pointer set, the directory's 30 bytes zeros, the strip after them.
        file[34..38].copy_from_slice(&42u32.to_le_bytes());
        file.extend([0; 30]);
        file.extend([5, 6, 7, 8, 9, 10]);
        write(&file);
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![],
            "a reserved directory is not a page"
        );
        file.truncate(42);
        file[34..38].copy_from_slice(&0u32.to_le_bytes());
        file.extend(directory(72, 6, 0));
        file.extend([5, 6, 7, 8, 9, 10]);
        write(&file);
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![],
            "page 1 written, but page 0 does not point at it yet"
        );
        file[34..38].copy_from_slice(&42u32.to_le_bytes());
        write(&file[..75]);
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![],
            "strip cut short"
        );
        write(&file);
        assert_eq!(
            cursor.advance(&path, 10).unwrap(),
            vec![StackPage { index: 1, end: 78 }],
            "only the new page"
        );
        assert_eq!(cursor.pages(), 2);

        // A new cursor reads both pages from the start; `max_pages` bounds it.
        let mut fresh = StackCursor::open(&path).unwrap().unwrap();
        assert_eq!(fresh.advance(&path, 1).unwrap().len(), 1);

        write(&file[..40]);
        assert!(matches!(
            cursor.advance(&path, 10),
            Err(DecodeError::Corrupt { .. })
        ));
        std::fs::write(&path, b"\x89PNG\r\n\x1a\n").unwrap();
        assert_eq!(StackCursor::open(&path).unwrap(), None, "not a TIFF");
    }
}
