//! The quick read of a clean CSV file straight into row-major number buffers: no quotes, no
//! carriage returns, every row as wide as the header, every wanted number written plainly
//! (`-?digits[.digits]`) and every wanted text cell non-empty without surrounding spaces.
//!
//! Millions of respondents are read this way in one parallel pass over the bytes, without
//! a frame in between. Anything else (a missing value, text in a numeric column, a ragged
//! row, quoting) makes it give up with `None`, and the caller reads the file the careful
//! way ([`super::load_table_bytes`]), which names every problem by row and column. On a
//! file both accept they give the same numbers: plain decimals are parsed to the nearest
//! double here (Clinger 1990's exact case, else the standard library's correctly rounded
//! parser), as polars does.

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};

use rayon::prelude::*;

use super::{MAX_CELL_BYTES, MAX_LINE_BYTES};

/// Where a numeric column's values go: output buffer `output`, column `column` of its rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Target {
    pub output: usize,
    pub column: usize,
}

/// What to read: numeric columns with their targets, row-major output buffers of the given
/// widths (cells no column is written to hold 1.0, e.g. an intercept), and optionally one
/// text column read as codes.
pub struct CleanRequest<'a> {
    pub numbers: Vec<(&'a str, Target)>,
    pub widths: Vec<usize>,
    pub codes: Option<&'a str>,
}

/// The quick read's result: `outputs[o]` holds `rows * widths[o]` values; `codes[i]` is row
/// i's text as an index into `levels` (in order of first appearance).
pub struct CleanRead {
    pub rows: usize,
    pub outputs: Vec<Vec<f64>>,
    pub codes: Vec<usize>,
    pub levels: Vec<String>,
}

#[derive(Clone, Copy)]
enum Role {
    Skip,
    Number(Target),
    Code,
}

/// Reads `bytes` as described in the module comment; `None` whenever the careful read is
/// needed.
pub fn read_clean_csv(bytes: &[u8], request: &CleanRequest) -> Option<CleanRead> {
    let header_end = bytes.iter().position(|&b| b == b'\n')?;
    // Quotes and carriage returns go to the careful read: the header's here, the body's in
    // the parallel pass below.
    if unclean(&bytes[..header_end]) {
        return None;
    }
    let header = std::str::from_utf8(&bytes[..header_end]).ok()?;
    let names: Vec<&str> = header.split(',').collect();
    if names
        .iter()
        .any(|n| n.is_empty() || n.trim().len() != n.len())
    {
        return None;
    }
    let mut sorted = names.clone();
    sorted.sort_unstable();
    if sorted.windows(2).any(|w| w[0] == w[1]) || header_end >= MAX_CELL_BYTES {
        return None;
    }
    let mut roles = vec![Role::Skip; names.len()];
    for (name, target) in &request.numbers {
        let at = names.iter().position(|n| n == name)?;
        if target.output >= request.widths.len()
            || target.column >= request.widths[target.output]
            || !matches!(roles[at], Role::Skip)
        {
            return None;
        }
        roles[at] = Role::Number(*target);
    }
    if let Some(code) = request.codes {
        let at = names.iter().position(|n| *n == code)?;
        if !matches!(roles[at], Role::Skip) {
            return None;
        }
        roles[at] = Role::Code;
    }
    let body = &bytes[header_end + 1..];
    // One final line break is allowed; a blank line anywhere else goes to the careful read.
    let body = body.strip_suffix(b"\n").unwrap_or(body);
    if body.is_empty() {
        return None;
    }
    let chunks = split_at_lines(body, rayon::current_num_threads().max(1) * 8);
    // First pass: rows per chunk (and UTF-8, so that codes are text; no quotes or carriage
    // returns).
    let rows_per_chunk: Vec<usize> = chunks
        .par_iter()
        .map(|c| {
            (std::str::from_utf8(c).is_ok() && !unclean(c))
                .then(|| c.iter().filter(|&&b| b == b'\n').count() + 1)
        })
        .collect::<Option<_>>()?;
    let rows: usize = rows_per_chunk.iter().sum();
    // Zeroed buffers come from the system untouched, so that their pages are first written
    // by the parallel pass below rather than filled here on one core; the cells no column
    // is written to get their 1.0 there too.
    let mut outputs: Vec<Vec<f64>> = request.widths.iter().map(|w| vec![0.0; rows * w]).collect();
    let ones: Vec<Vec<usize>> = request
        .widths
        .iter()
        .enumerate()
        .map(|(o, &width)| {
            (0..width)
                .filter(|&c| {
                    !request
                        .numbers
                        .iter()
                        .any(|(_, t)| t.output == o && t.column == c)
                })
                .collect()
        })
        .collect();
    let mut codes = vec![0usize; if request.codes.is_some() { rows } else { 0 }];
    // Second pass: each chunk fills its own rows of every output.
    let mut pieces: Vec<ChunkOut> = Vec::with_capacity(chunks.len());
    {
        let mut rest_outputs: Vec<&mut [f64]> = outputs.iter_mut().map(Vec::as_mut_slice).collect();
        let mut rest_codes: &mut [usize] = &mut codes;
        for (chunk, &n) in chunks.iter().zip(&rows_per_chunk) {
            let mut mine = Vec::with_capacity(rest_outputs.len());
            let mut next = Vec::with_capacity(rest_outputs.len());
            for (o, out) in rest_outputs.into_iter().enumerate() {
                let (a, b) = out.split_at_mut(n * request.widths[o]);
                mine.push(a);
                next.push(b);
            }
            rest_outputs = next;
            let take = if request.codes.is_some() { n } else { 0 };
            let (a, b) = std::mem::take(&mut rest_codes).split_at_mut(take);
            rest_codes = b;
            pieces.push(ChunkOut {
                bytes: chunk,
                outputs: mine,
                codes: a,
            });
        }
    }
    let levels_per_chunk: Vec<Vec<&[u8]>> = pieces
        .par_iter_mut()
        .map(|p| parse_chunk(p, &roles, &request.widths, &ones))
        .collect::<Option<_>>()?;
    // Levels in order of first appearance: chunk by chunk, each in its own order.
    let mut index: CodeMap<usize> = CodeMap::default();
    let mut levels: Vec<String> = Vec::new();
    let renumber: Vec<Vec<usize>> = levels_per_chunk
        .iter()
        .map(|chunk_levels| {
            chunk_levels
                .iter()
                .map(|&l| {
                    *index.entry(l).or_insert_with(|| {
                        levels.push(String::from_utf8_lossy(l).into_owned());
                        levels.len() - 1
                    })
                })
                .collect()
        })
        .collect();
    pieces
        .par_iter_mut()
        .zip(&renumber)
        .for_each(|(p, map)| p.codes.iter_mut().for_each(|c| *c = map[*c]));
    drop(pieces);
    Some(CleanRead {
        rows,
        outputs,
        codes,
        levels,
    })
}

struct ChunkOut<'a, 'b> {
    bytes: &'a [u8],
    outputs: Vec<&'b mut [f64]>,
    codes: &'b mut [usize],
}

/// About `parts` pieces of `body`, each ending just before a line break (the last at the
/// end), so that every piece holds whole lines.
fn split_at_lines(body: &[u8], parts: usize) -> Vec<&[u8]> {
    let target = body.len().div_ceil(parts).max(1 << 16);
    let mut out = Vec::new();
    let mut start = 0;
    while start < body.len() {
        let guess = (start + target).min(body.len());
        let end = match body[guess..].iter().position(|&b| b == b'\n') {
            Some(p) => guess + p,
            None => body.len(),
        };
        out.push(&body[start..end]);
        start = end + 1;
    }
    out
}

/// Quotes or carriage returns, which only the careful read handles.
fn unclean(bytes: &[u8]) -> bool {
    bytes.contains(&b'"') || bytes.contains(&b'\r')
}

/// Parses one chunk's lines into its slices of the outputs (and 1.0 into each output's
/// columns in `ones`); returns the chunk's levels in order of first appearance (its codes
/// index them). `None` on anything unclean. One scan over the bytes: each cell is read
/// where it starts, up to the comma or line break that ends it.
fn parse_chunk<'a>(
    piece: &mut ChunkOut<'a, '_>,
    roles: &[Role],
    widths: &[usize],
    ones: &[Vec<usize>],
) -> Option<Vec<&'a [u8]>> {
    let mut levels: Vec<&'a [u8]> = Vec::new();
    let mut index: CodeMap<usize> = CodeMap::default();
    let mut recent = RecentCodes::default();
    let bytes: &'a [u8] = piece.bytes;
    let limit = MAX_CELL_BYTES.min(MAX_LINE_BYTES);
    let last_field = roles.len().checked_sub(1)?;
    let mut pos = 0usize;
    let mut row = 0usize;
    loop {
        let line_start = pos;
        for (o, columns) in ones.iter().enumerate() {
            let out = &mut piece.outputs[o];
            for &c in columns {
                *out.get_mut(row * widths[o] + c)? = 1.0;
            }
        }
        for (field, role) in roles.iter().enumerate() {
            let cell_start = pos;
            match role {
                Role::Number(t) => {
                    let (value, end) = scan_plain_number(bytes, pos)?;
                    pos = end;
                    *piece.outputs[t.output].get_mut(row * widths[t.output] + t.column)? = value;
                }
                Role::Skip | Role::Code => {
                    pos += bytes[pos..]
                        .iter()
                        .position(|&b| b == b',' || b == b'\n')
                        .unwrap_or(bytes.len() - pos);
                }
            }
            if let Role::Code = role {
                let cell = &bytes[cell_start..pos];
                let (first, end) = (*cell.first()?, *cell.last()?);
                if first.is_ascii_whitespace()
                    || end.is_ascii_whitespace()
                    || first >= 0x80
                    || end >= 0x80
                {
                    return None;
                }
                let code = match recent.get(cell) {
                    Some(code) => code,
                    None => {
                        let code = *index.entry(cell).or_insert_with(|| {
                            levels.push(cell);
                            levels.len() - 1
                        });
                        recent.put(cell, code);
                        code
                    }
                };
                *piece.codes.get_mut(row)? = code;
            }
            // A comma after every field but the last; a line break or the chunk's end after
            // the last (a row with fewer or more fields goes to the careful read).
            let separator = bytes.get(pos).copied();
            match (field == last_field, separator) {
                (false, Some(b',')) => pos += 1,
                (true, Some(b'\n') | None) => {}
                _ => return None,
            }
        }
        if pos - line_start >= limit {
            return None;
        }
        row += 1;
        if pos >= bytes.len() {
            break;
        }
        // Past the line break; a line break at the very end leaves an empty last line,
        // which the next round refuses (its first cell is empty).
        pos += 1;
    }
    Some(levels)
}

/// The codes last seen, by their bytes packed into a number (cells of up to 8 bytes): a
/// country code is usually found here without hashing it.
struct RecentCodes {
    slots: [(u64, u32); 64],
}

impl Default for RecentCodes {
    fn default() -> Self {
        // Length 0 marks an empty slot: code cells are never empty.
        RecentCodes {
            slots: [(0, 0); 64],
        }
    }
}

impl RecentCodes {
    fn key(cell: &[u8]) -> Option<u64> {
        if cell.is_empty() || cell.len() > 7 {
            return None;
        }
        // The bytes from the lowest up (shifts: no copy through memory) and the length in
        // the top byte, so that "X" and "X\0" differ.
        let packed = cell
            .iter()
            .rev()
            .fold(0u64, |word, &b| (word << 8) | u64::from(b));
        Some(packed | (cell.len() as u64) << 56)
    }
    fn slot(key: u64) -> usize {
        (key.wrapping_mul(0x9E37_79B9_7F4A_7C15) >> 58) as usize
    }
    fn get(&self, cell: &[u8]) -> Option<usize> {
        let key = Self::key(cell)?;
        let (k, code) = self.slots[Self::slot(key)];
        (k == key).then_some(code as usize)
    }
    fn put(&mut self, cell: &[u8], code: usize) {
        if let (Some(key), Ok(code)) = (Self::key(cell), u32::try_from(code)) {
            self.slots[Self::slot(key)] = (key, code);
        }
    }
}

/// Powers of ten that are exact doubles.
const EXACT_POWERS: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// `-?digits[.digits]` to the nearest double; `None` for anything else (empty, `NA`,
/// exponents, spaces, a sign `+`). With at most 15 digits the digits and the power of ten
/// are exact doubles, so one division rounds correctly (Clinger 1990, "How to read
/// floating point numbers accurately"); longer numbers go to the standard library's
/// correctly rounded parser.
#[cfg(test)]
fn parse_plain_number(cell: &[u8]) -> Option<f64> {
    match scan_plain_number(cell, 0)? {
        (value, end) if end == cell.len() => Some(value),
        _ => None,
    }
}

/// The plain number (as [`parse_plain_number`] reads it) that starts at `start` and ends
/// at the next comma, line break or the end of `bytes`, and where it ends; `None` if the
/// cell is anything else.
#[inline]
fn scan_plain_number(bytes: &[u8], start: usize) -> Option<(f64, usize)> {
    let negative = bytes.get(start) == Some(&b'-');
    let digits_start = start + usize::from(negative);
    let mut mantissa: u64 = 0;
    let mut count = 0usize;
    let mut fraction: Option<usize> = None;
    let mut end = digits_start;
    while let Some(&b) = bytes.get(end) {
        match b {
            b'0'..=b'9' => {
                mantissa = mantissa.wrapping_mul(10).wrapping_add(u64::from(b - b'0'));
                count += 1;
            }
            b'.' if fraction.is_none() => fraction = Some(count),
            b',' | b'\n' => break,
            _ => return None,
        }
        end += 1;
    }
    let decimals = fraction.map_or(0, |f| count - f);
    // Digits on both sides of a point: "5." and ".5" go to the careful read.
    if count == 0 || fraction.is_some_and(|f| f == 0 || decimals == 0) {
        return None;
    }
    let magnitude = if count <= 15 {
        mantissa as f64 / EXACT_POWERS[decimals]
    } else {
        std::str::from_utf8(&bytes[digits_start..end])
            .ok()?
            .parse::<f64>()
            .ok()?
    };
    Some((if negative { -magnitude } else { magnitude }, end))
}

/// A multiply-and-rotate hash (the one rustc uses, "FxHash") for short codes: the keys are
/// the file's own country codes, so resistance to crafted collisions is not needed.
#[derive(Default)]
struct CodeHasher(u64);

impl Hasher for CodeHasher {
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0.rotate_left(5) ^ u64::from(b)).wrapping_mul(0x51_7c_c1_b7_27_22_0a_95);
        }
    }
    fn finish(&self) -> u64 {
        self.0
    }
}

type CodeMap<'a, V> = HashMap<&'a [u8], V, BuildHasherDefault<CodeHasher>>;

#[cfg(test)]
mod tests {
    use super::*;

    fn request() -> CleanRequest<'static> {
        CleanRequest {
            numbers: vec![
                (
                    "y",
                    Target {
                        output: 1,
                        column: 0,
                    },
                ),
                (
                    "a",
                    Target {
                        output: 0,
                        column: 1,
                    },
                ),
                (
                    "b",
                    Target {
                        output: 0,
                        column: 2,
                    },
                ),
            ],
            widths: vec![3, 1],
            codes: Some("c"),
        }
    }

    #[test]
    fn reads_numbers_and_codes_in_order_of_first_appearance() {
        let read = read_clean_csv(
            b"c,a,skip,b,y\nXB,1.5,t,-2,1\nXA,0.25,u,3,0\nXB,7,v,0.1,1\n",
            &request(),
        )
        .unwrap();
        assert_eq!(read.rows, 3);
        assert_eq!(
            read.outputs[0],
            vec![1.0, 1.5, -2.0, 1.0, 0.25, 3.0, 1.0, 7.0, 0.1]
        );
        assert_eq!(read.outputs[1], vec![1.0, 0.0, 1.0]);
        assert_eq!(read.codes, vec![0, 1, 0]);
        assert_eq!(read.levels, vec!["XB".to_string(), "XA".to_string()]);
    }

    #[test]
    fn anything_unclean_goes_to_the_careful_read() {
        let bad: [&[u8]; 10] = [
            b"c,a,b,y\nXA,NA,1,1\n",
            b"c,a,b,y\nXA,,1,1\n",
            b"c,a,b,y\nXA,1,1\n",
            b"c,a,b,y\nXA,1,1,1,1\n",
            b"c,a,b,y\n\"XA\",1,1,1\n",
            b"c,a,b,y\r\nXA,1,1,1\r\n",
            b"c,a,b,y\nXA,1e3,1,1\n",
            b"c,a,b,y\n XA,1,1,1\n",
            b"c,a,b,y\nXA,1,1,1\n\n",
            b"c,a,a,y\nXA,1,1,1\n",
        ];
        for text in bad {
            assert!(
                read_clean_csv(text, &request()).is_none(),
                "{}",
                String::from_utf8_lossy(text)
            );
        }
        assert!(read_clean_csv(b"c,a,b,y\nXA,1,1,1", &request()).is_some());
    }

    #[test]
    fn plain_numbers_parse_as_the_standard_library_does() {
        // Common practice: the standard library's parser rounds correctly, so it is the
        // reference for every accepted form, including more than 15 digits.
        for text in [
            "0",
            "-0",
            "45",
            "1.234",
            "-0.001",
            "0.1",
            "123456789012345",
            "1234567890.12345678",
            "99999999999999999999.5",
            "0.30000000000000004",
        ] {
            let ours = parse_plain_number(text.as_bytes()).unwrap();
            assert_eq!(
                ours.to_bits(),
                text.parse::<f64>().unwrap().to_bits(),
                "{text}"
            );
        }
        for text in ["", "-", ".5", "5.", "1.2.3", "+1", "1e5", "NA", "inf", "1 "] {
            assert!(parse_plain_number(text.as_bytes()).is_none(), "{text}");
        }
    }

    #[test]
    fn codes_that_share_a_slot_of_the_recent_codes_keep_their_own_level() {
        // Common practice: 300 codes (more than the 64 recent slots, some longer than 7
        // bytes, one a prefix of another), interleaved, get the indices of first appearance.
        let names: Vec<String> = (0..300)
            .map(|i| match i % 3 {
                0 => format!("X{i}"),
                1 => format!("X{i}0"),
                _ => format!("Country{i}"),
            })
            .collect();
        let mut text = String::from("c,a,b,y\n");
        let mut expected = Vec::new();
        for r in 0..3000 {
            let g = (r * 7) % 300;
            text.push_str(&format!("{},1,2,0\n", names[g]));
            expected.push(g);
        }
        let read = read_clean_csv(text.as_bytes(), &request()).unwrap();
        let decoded: Vec<&str> = read
            .codes
            .iter()
            .map(|&c| read.levels[c].as_str())
            .collect();
        let wanted: Vec<&str> = expected.iter().map(|&g| names[g].as_str()).collect();
        assert_eq!(decoded, wanted);
        assert_eq!(read.levels.len(), 300);
        assert_eq!(read.levels[1], names[7]);
    }

    #[test]
    fn chunks_hold_whole_lines() {
        let body: Vec<u8> = (0..50_000)
            .flat_map(|i| format!("X{},{}\n", i % 7, i).into_bytes())
            .collect();
        let body = &body[..body.len() - 1];
        let parts = split_at_lines(body, 8);
        assert!(parts.len() > 1);
        let lines: usize = parts.iter().map(|p| p.split(|&b| b == b'\n').count()).sum();
        assert_eq!(lines, 50_000);
        assert!(parts.iter().all(|p| !p.is_empty() && p[0] == b'X'));
    }
}
