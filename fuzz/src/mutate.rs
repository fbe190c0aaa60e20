//! Byte-level mutations of a seed input: bit flips, random and "interesting" bytes, inserted,
//! deleted and duplicated ranges, truncation, splices with another seed, and replacement of
//! tokens (numbers and YAML/TSV punctuation) by values that parsers often mishandle. A few
//! mutations are stacked per input, as AFL's havoc stage does (common practice in fuzzing).

use crate::rng::Rng;

/// Texts that often break parsers of numbers and of structure.
const INTERESTING: &[&str] = &[
    "-1",
    "0",
    "1",
    "-0",
    "255",
    "256",
    "32767",
    "-32768",
    "65536",
    "2147483648",
    "99999999",
    "-99999999",
    "1e308",
    "-1e308",
    "1e-320",
    "nan",
    "NaN",
    "inf",
    "-inf",
    "0x10",
    "1.5",
    ".",
    "-",
    "+",
    "e",
    "",
    " ",
    "\t",
    "\n",
    "\r\n",
    "n/a",
    "\u{b5}V",
    "&a",
    "*a",
    "<<: *a",
    "[",
    "]",
    "{",
    "}",
    ": ",
    "- ",
    "? ",
    "!!binary",
    "|",
    ">",
    "'",
    "\"",
    "#",
    "%YAML 1.2",
    "---",
    "...",
    "~",
    "null",
    "true",
    "[[[[[[[[[[",
    "{a: {a: {a: {a: {a: {a:",
    "../",
    "/",
    "\u{0}",
    "\u{feff}",
];

/// Apply 1 to 8 random mutations to `input`; `other` is another seed for splicing.
pub fn mutate(rng: &mut Rng, input: &[u8], other: &[u8]) -> Vec<u8> {
    let mut data = input.to_vec();
    let rounds = 1 + rng.below(8);
    for _ in 0..rounds {
        apply_one(rng, &mut data, other);
    }
    data
}

fn apply_one(rng: &mut Rng, data: &mut Vec<u8>, other: &[u8]) {
    match rng.below(10) {
        0 => flip_bit(rng, data),
        1 => set_byte(rng, data),
        2 => insert_interesting(rng, data),
        3 => overwrite_interesting(rng, data),
        4 => delete_range(rng, data),
        5 => duplicate_range(rng, data),
        6 => truncate(rng, data),
        7 => splice(rng, data, other),
        8 => replace_number(rng, data),
        _ => swap_lines(rng, data),
    }
}

fn flip_bit(rng: &mut Rng, data: &mut [u8]) {
    if !data.is_empty() {
        let i = rng.below(data.len());
        data[i] ^= 1 << rng.below(8);
    }
}

fn set_byte(rng: &mut Rng, data: &mut [u8]) {
    if !data.is_empty() {
        let i = rng.below(data.len());
        data[i] = *rng.pick(&[0x00, 0xFF, 0x7F, 0x80, b' ', b'-', b'9', b'\n', b'\t']);
    }
}

fn insert_interesting(rng: &mut Rng, data: &mut Vec<u8>) {
    let at = rng.below(data.len() + 1);
    let text = rng.pick(INTERESTING).as_bytes();
    data.splice(at..at, text.iter().copied());
}

/// Overwrite in place, keeping the length: fixed-width header fields stay aligned.
fn overwrite_interesting(rng: &mut Rng, data: &mut [u8]) {
    let text = rng.pick(INTERESTING).as_bytes();
    if data.len() >= text.len() {
        let at = rng.below(data.len() - text.len() + 1);
        data[at..at + text.len()].copy_from_slice(text);
    }
}

fn range(rng: &mut Rng, len: usize) -> (usize, usize) {
    let start = rng.below(len + 1);
    let max = (len - start).min(if rng.one_in(4) { len } else { 64 });
    (start, start + rng.below(max + 1))
}

fn delete_range(rng: &mut Rng, data: &mut Vec<u8>) {
    let (a, b) = range(rng, data.len());
    data.drain(a..b);
}

fn duplicate_range(rng: &mut Rng, data: &mut Vec<u8>) {
    let (a, b) = range(rng, data.len());
    let copy = data[a..b].to_vec();
    let at = rng.below(data.len() + 1);
    data.splice(at..at, copy);
}

fn truncate(rng: &mut Rng, data: &mut Vec<u8>) {
    let keep = rng.below(data.len() + 1);
    data.truncate(keep);
}

fn splice(rng: &mut Rng, data: &mut Vec<u8>, other: &[u8]) {
    let (a, b) = range(rng, data.len());
    let (c, d) = range(rng, other.len());
    data.splice(a..b, other[c..d].iter().copied());
}

/// Replace one run of digits (with its sign and decimal point) by an interesting number.
fn replace_number(rng: &mut Rng, data: &mut Vec<u8>) {
    let starts: Vec<usize> = (0..data.len())
        .filter(|&i| data[i].is_ascii_digit() && (i == 0 || !data[i - 1].is_ascii_digit()))
        .collect();
    if starts.is_empty() {
        return;
    }
    let a = *rng.pick(&starts);
    let mut b = a;
    while b < data.len() && (data[b].is_ascii_digit() || data[b] == b'.') {
        b += 1;
    }
    let text = rng.pick(&INTERESTING[..19]).as_bytes();
    data.splice(a..b, text.iter().copied());
}

/// Swap two lines (or delete one): structure errors in line-based formats.
fn swap_lines(rng: &mut Rng, data: &mut Vec<u8>) {
    let mut lines: Vec<Vec<u8>> = data.split(|&b| b == b'\n').map(<[u8]>::to_vec).collect();
    if lines.len() < 2 {
        return;
    }
    let i = rng.below(lines.len());
    let j = rng.below(lines.len());
    if rng.one_in(3) {
        lines.remove(i);
    } else {
        lines.swap(i, j);
    }
    *data = lines.join(&b'\n');
}
