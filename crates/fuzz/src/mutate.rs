//! Byte- and text-level mutations of seed files.
//!
//! Without coverage instrumentation (the stable toolchain has none built in), the mutations are
//! chosen to reach the places where parsers of this project go wrong: numbers in headers and
//! settings (replaced by the extremes of every integer width, huge decimals, NaN, infinities),
//! the format's own keywords (a per-target dictionary), repeated or dropped lines and chunks,
//! cut-off files and binary integers overwritten in place.

/// Numbers that break naive parsers: the edges of integer widths, values that overflow when
/// used as sizes or offsets, floating-point specials.
const INTERESTING_NUMBERS: &[&str] = &[
    "0",
    "1",
    "-1",
    "2",
    "-0",
    "255",
    "256",
    "65535",
    "65536",
    "2147483647",
    "2147483648",
    "-2147483648",
    "4294967295",
    "4294967296",
    "99999999999",
    "9223372036854775807",
    "9223372036854775808",
    "18446744073709551615",
    "18446744073709551616",
    "9999999999999999999999",
    "1e9",
    "1e11",
    "1e15",
    "1e308",
    "1e309",
    "-1e309",
    "1e-320",
    "0.0000001",
    "nan",
    "NaN",
    "inf",
    "-inf",
    "infinity",
    "3.5",
    "-2000000000",
];

/// Binary integers for in-place overwrites (little- and big-endian are both tried).
const INTERESTING_INTEGERS: &[u64] = &[
    0,
    1,
    0x7f,
    0x80,
    0xff,
    0x7fff,
    0x8000,
    0xffff,
    0x7fff_ffff,
    0x8000_0000,
    0xffff_ffff,
    0x7fff_ffff_ffff_ffff,
    0x8000_0000_0000_0000,
    u64::MAX,
    1,
    16_000,
    44_100,
    384_001,
];

/// A small, fast, seeded generator (SplitMix64): the fuzz run is reproducible from its seed.
#[derive(Debug, Clone)]
pub struct Rng(u64);

impl Rng {
    /// A generator with the given seed.
    pub fn new(seed: u64) -> Self {
        Rng(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `0..n` (`n` ≥ 1).
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n.max(1) as u64) as usize
    }

    /// True with probability 1/n.
    pub fn one_in(&mut self, n: usize) -> bool {
        self.below(n) == 0
    }
}

/// Applies a few random mutations to `input`, keeping it at most `max_len` bytes.
/// `dictionary` holds the format's keywords; `others` are the other inputs of the pool, for
/// splicing.
pub fn mutate(
    rng: &mut Rng,
    input: &mut Vec<u8>,
    dictionary: &[&str],
    others: &[Vec<u8>],
    max_len: usize,
) {
    let rounds = 1 + rng.below(4);
    for _ in 0..rounds {
        match rng.below(14) {
            0 => flip_bit(rng, input),
            1 => set_byte(rng, input),
            2 => insert_bytes(rng, input),
            3 => delete_range(rng, input),
            4 => duplicate_range(rng, input),
            5 => overwrite_integer(rng, input),
            6 | 7 => replace_number(rng, input),
            8 => insert_token(rng, input, dictionary),
            9 => splice(rng, input, others),
            10 => truncate(rng, input),
            11 => repeat_line(rng, input),
            12 => delete_line(rng, input),
            _ => swap_ranges(rng, input),
        }
    }
    input.truncate(max_len);
}

fn flip_bit(rng: &mut Rng, input: &mut [u8]) {
    if !input.is_empty() {
        let at = rng.below(input.len());
        input[at] ^= 1 << rng.below(8);
    }
}

fn set_byte(rng: &mut Rng, input: &mut [u8]) {
    if !input.is_empty() {
        let at = rng.below(input.len());
        input[at] = match rng.below(4) {
            0 => b"\t\n\r \\=[]{}\"'#.,-+0e"[rng.below(19)],
            1 => 0,
            2 => 0xff,
            _ => rng.next_u64() as u8,
        };
    }
}

fn insert_bytes(rng: &mut Rng, input: &mut Vec<u8>) {
    let at = rng.below(input.len() + 1);
    let count = 1 + rng.below(16);
    let byte = rng.next_u64() as u8;
    let same = rng.one_in(2);
    let bytes: Vec<u8> = (0..count)
        .map(|_| if same { byte } else { rng.next_u64() as u8 })
        .collect();
    input.splice(at..at, bytes);
}

fn range(rng: &mut Rng, len: usize) -> (usize, usize) {
    let start = rng.below(len + 1);
    let longest = (len - start).min(if rng.one_in(4) { len } else { 64 });
    (start, start + rng.below(longest + 1))
}

fn delete_range(rng: &mut Rng, input: &mut Vec<u8>) {
    let (start, end) = range(rng, input.len());
    input.drain(start..end);
}

fn duplicate_range(rng: &mut Rng, input: &mut Vec<u8>) {
    let (start, end) = range(rng, input.len());
    let chunk = input[start..end].to_vec();
    let at = rng.below(input.len() + 1);
    let copies = if rng.one_in(8) { 1 + rng.below(64) } else { 1 };
    for _ in 0..copies {
        input.splice(at..at, chunk.iter().copied());
    }
}

fn overwrite_integer(rng: &mut Rng, input: &mut [u8]) {
    let width = [1usize, 2, 4, 8][rng.below(4)];
    if input.len() < width {
        return;
    }
    let value = INTERESTING_INTEGERS[rng.below(INTERESTING_INTEGERS.len())];
    let value = if rng.one_in(4) {
        value.wrapping_add(rng.below(5) as u64).wrapping_sub(2)
    } else {
        value
    };
    let bytes = if rng.one_in(2) {
        value.to_le_bytes()
    } else {
        (value << (64 - 8 * width as u32).min(63)).to_be_bytes()
    };
    let at = rng.below(input.len() - width + 1);
    input[at..at + width].copy_from_slice(&bytes[..width]);
}

/// Replaces one run of decimal digits (with its sign, point and exponent) by an interesting
/// number: where text formats keep their sizes, counts and times.
fn replace_number(rng: &mut Rng, input: &mut Vec<u8>) {
    let starts: Vec<usize> = (0..input.len())
        .filter(|&i| input[i].is_ascii_digit() && (i == 0 || !input[i - 1].is_ascii_alphanumeric()))
        .collect();
    let replacement = INTERESTING_NUMBERS[rng.below(INTERESTING_NUMBERS.len())].as_bytes();
    if starts.is_empty() {
        let at = rng.below(input.len() + 1);
        input.splice(at..at, replacement.iter().copied());
        return;
    }
    let mut start = starts[rng.below(starts.len())];
    if start > 0 && input[start - 1] == b'-' {
        start -= 1;
    }
    let mut end = start + 1;
    while end < input.len() && matches!(input[end], b'0'..=b'9' | b'.' | b'e' | b'E' | b'+') {
        end += 1;
    }
    input.splice(start..end, replacement.iter().copied());
}

fn insert_token(rng: &mut Rng, input: &mut Vec<u8>, dictionary: &[&str]) {
    if dictionary.is_empty() {
        return insert_bytes(rng, input);
    }
    let token = dictionary[rng.below(dictionary.len())].as_bytes();
    let at = rng.below(input.len() + 1);
    input.splice(at..at, token.iter().copied());
}

fn splice(rng: &mut Rng, input: &mut Vec<u8>, others: &[Vec<u8>]) {
    if others.is_empty() {
        return;
    }
    let other = &others[rng.below(others.len())];
    let (start, end) = range(rng, other.len());
    let at = rng.below(input.len() + 1);
    let cut = (at + rng.below(input.len() - at + 1)).min(input.len());
    input.splice(at..cut, other[start..end].iter().copied());
}

fn truncate(rng: &mut Rng, input: &mut Vec<u8>) {
    let keep = rng.below(input.len() + 1);
    input.truncate(keep);
}

fn line_bounds(rng: &mut Rng, input: &[u8]) -> Option<(usize, usize)> {
    let breaks: Vec<usize> = input
        .iter()
        .enumerate()
        .filter(|(_, &b)| b == b'\n')
        .map(|(i, _)| i)
        .collect();
    if breaks.is_empty() {
        return None;
    }
    let which = rng.below(breaks.len());
    let start = if which == 0 { 0 } else { breaks[which - 1] + 1 };
    Some((start, breaks[which] + 1))
}

fn repeat_line(rng: &mut Rng, input: &mut Vec<u8>) {
    if let Some((start, end)) = line_bounds(rng, input) {
        let line = input[start..end].to_vec();
        let most = if rng.one_in(4) { 200 } else { 3 };
        let copies = 1 + rng.below(most);
        for _ in 0..copies {
            input.splice(end..end, line.iter().copied());
        }
    }
}

fn delete_line(rng: &mut Rng, input: &mut Vec<u8>) {
    if let Some((start, end)) = line_bounds(rng, input) {
        input.drain(start..end);
    }
}

fn swap_ranges(rng: &mut Rng, input: &mut [u8]) {
    let len = input.len();
    if len < 2 {
        return;
    }
    let width = 1 + rng.below((len / 2).min(32));
    let a = rng.below(len - width + 1);
    let b = rng.below(len - width + 1);
    if a + width <= b || b + width <= a {
        for i in 0..width {
            input.swap(a + i, b + i);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_same_seed_gives_the_same_mutations() {
        let seed = b"ngram 1=3\nngram 2=2\n".to_vec();
        let run = |s: u64| {
            let mut rng = Rng::new(s);
            let mut input = seed.clone();
            for _ in 0..50 {
                mutate(
                    &mut rng,
                    &mut input,
                    &["\\data\\"],
                    std::slice::from_ref(&seed),
                    4096,
                );
            }
            input
        };
        assert_eq!(run(7), run(7));
        assert_ne!(run(7), run(8));
    }

    #[test]
    fn numbers_are_replaced_whole() {
        let mut rng = Rng::new(3);
        let mut seen_huge = false;
        for _ in 0..200 {
            let mut input = b"ngram 1=12\n".to_vec();
            replace_number(&mut rng, &mut input);
            let text = String::from_utf8(input).unwrap();
            assert!(text.starts_with("ngram "), "{text}");
            seen_huge |= text.contains("=18446744073709551615\n");
        }
        assert!(seen_huge);
    }

    #[test]
    fn length_stays_within_the_cap() {
        let mut rng = Rng::new(11);
        let mut input = vec![b'a'; 100];
        for _ in 0..500 {
            mutate(&mut rng, &mut input, &["xyz"], &[vec![b'b'; 300]], 256);
            assert!(input.len() <= 256);
        }
    }
}
