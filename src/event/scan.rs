//! A fast path for the common shape of an event: one flat JSON object whose keys are the
//! event's own fields, whose strings have no escapes and whose numbers are plain integers (or,
//! for reward and propensity, plain decimals of up to 15 digits).
//! Anything else (escapes, fractions, exponents, unknown or repeated keys, nesting, odd
//! whitespace placement is fine) makes it give up, and the caller decodes with `serde_json`.
//!
//! It must never accept what `serde_json` would read differently: `tests/hostile.rs` checks
//! the two against each other on arbitrary, mutated and corpus bytes
//! ([`fast_path_agrees`]).
//!
//! Speed: keys and the two kinds are compared with constants after a dispatch on their first
//! letter; string values are checked for ASCII while their end is found, eight bytes at a
//! time, and only the others go through a UTF-8 check (outside them a flat object of this
//! shape is ASCII, or it is refused); integers are read eight digits at a time. A stream
//! decoder ([`crate::event::Decoder`]) also remembers the [`Shape`] of recent events, the text
//! between their values, and reads an event written the same way by comparing that text and
//! reading its values alone ([`shape_path_agrees`] is checked in `tests/hostile.rs` too).

use std::borrow::Cow;

use super::Raw;

/// Fills `raw` (which starts empty) with the fields of `bytes` if it has the common shape;
/// `None` to fall back to `serde_json`, with `raw` left partly filled. (Filled in place: the
/// struct is about 200 bytes, and moving it out cost a copy per event.)
pub(super) fn scan<'a>(bytes: &'a [u8], raw: &mut Raw<'a>) -> Option<()> {
    scan_noting(bytes, raw, &mut Spans::default())
}

/// Where the values of an event scanned lie: (field, start, end) in the order met. The kind,
/// when it is one of the two known, counts as part of the text between values.
#[derive(Default)]
pub(super) struct Spans {
    n: usize,
    at: [(u8, usize, usize); FIELDS],
    /// The kind, when the text named it.
    kind: Option<&'static str>,
}

/// [`scan`], noting in `spans` where each value lies (for [`Shape::learn`]).
pub(super) fn scan_noting<'a>(bytes: &'a [u8], raw: &mut Raw<'a>, spans: &mut Spans) -> Option<()> {
    let mut s = Scanner { b: bytes, i: 0 };
    let mut seen = 0u16;
    spans.n = 0;
    spans.kind = None;
    s.ws();
    s.expect(b'{')?;
    s.ws();
    if s.peek() == Some(b'}') {
        s.i += 1;
    } else {
        loop {
            let field = s.key()?;
            s.ws();
            s.expect(b':')?;
            s.ws();
            if seen & (1 << field) != 0 {
                return None;
            }
            seen |= 1 << field;
            match field {
                1 if s.literal(b"\"impression\"") => {
                    raw.kind = Some(Cow::Borrowed("impression"));
                    spans.kind = Some("impression");
                }
                1 if s.literal(b"\"reward\"") => {
                    raw.kind = Some(Cow::Borrowed("reward"));
                    spans.kind = Some("reward");
                }
                _ => {
                    let start = s.i;
                    s.value(field, raw)?;
                    // `seen` allows each field once, so there is room.
                    spans.at[spans.n] = (field as u8, start, s.i);
                    spans.n += 1;
                }
            }
            s.ws();
            match s.next()? {
                b',' => s.ws(),
                b'}' => break,
                _ => return None,
            }
        }
    }
    s.ws();
    (s.i == bytes.len()).then_some(())
}

/// The text between the values of an event the general scan took, and the field each value
/// fills. Producers write the events of one kind the same way every time (same keys, order
/// and spacing), so most events match the text of an earlier one and are read by comparing
/// that text and reading the values alone, with no search for keys.
///
/// An event read this way is, byte for byte, an event the general scan took with other values
/// in the same places, each read by the same code; so it reads as `serde_json` reads it, which
/// `tests/hostile.rs` checks ([`shape_path_agrees`]).
#[derive(Clone)]
pub(super) struct Shape {
    /// The texts between values, one after the other: text `k` (before value `k`; the last one
    /// follows the last value) ends at `ends[k]`.
    text: [u8; SHAPE_TEXT],
    ends: [u16; FIELDS + 1],
    fields: [u8; FIELDS],
    /// The kind, when the text names it.
    kind: Option<&'static str>,
    /// Values; `None` until a shape is learned.
    n: Option<u8>,
}

/// The event's own fields (their indices in `Raw`'s order, as [`Scanner::key`] gives them).
const FIELDS: usize = 11;

/// Bytes of text a shape holds; an event with more between its values is not learned.
const SHAPE_TEXT: usize = 256;

impl Default for Shape {
    fn default() -> Self {
        Shape { text: [0; SHAPE_TEXT], ends: [0; FIELDS + 1], fields: [0; FIELDS], kind: None, n: None }
    }
}

impl Shape {
    /// The shape of `bytes`, which the general scan took noting `spans`; `None` if its text is
    /// too long to keep.
    pub(super) fn learn(bytes: &[u8], spans: &Spans) -> Option<Shape> {
        let mut shape = Shape::default();
        let mut len = 0usize;
        let mut gap = |shape: &mut Shape, k: usize, from: usize, to: usize| -> Option<()> {
            let part = bytes.get(from..to)?;
            shape.text.get_mut(len..len + part.len())?.copy_from_slice(part);
            len += part.len();
            shape.ends[k] = len as u16;
            Some(())
        };
        let mut from = 0usize;
        for (k, &(field, start, end)) in spans.at[..spans.n].iter().enumerate() {
            gap(&mut shape, k, from, start)?;
            shape.fields[k] = field;
            from = end;
        }
        gap(&mut shape, spans.n, from, bytes.len())?;
        shape.kind = spans.kind;
        shape.n = Some(spans.n as u8);
        Some(shape)
    }

    /// Fills `raw` (which starts empty) if `bytes` has this shape; `None` otherwise, with `raw`
    /// left partly filled.
    #[inline(always)]
    pub(super) fn read<'a>(&self, bytes: &'a [u8], raw: &mut Raw<'a>) -> Option<()> {
        let n = usize::from(self.n?);
        let mut s = Scanner { b: bytes, i: 0 };
        let mut from = 0usize;
        for k in 0..=n {
            let to = usize::from(self.ends[k]);
            if !s.text(&self.text[from..to]) {
                return None;
            }
            from = to;
            if k < n {
                s.value(u16::from(self.fields[k]), raw)?;
            }
        }
        if let Some(kind) = self.kind {
            raw.kind = Some(Cow::Borrowed(kind));
        }
        (s.i == bytes.len()).then_some(())
    }
}

/// For tests: with the shape of `teacher` learned, `Ok(true)` when that shape took `bytes`
/// and read exactly what `serde_json` reads, `Ok(false)` when it did not take them (or the
/// teacher had no shape), `Err` when the two disagree.
#[doc(hidden)]
pub fn shape_path_agrees(teacher: &[u8], bytes: &[u8]) -> Result<bool, String> {
    let mut spans = Spans::default();
    if scan_noting(teacher, &mut Raw::default(), &mut spans).is_none() {
        return Ok(false);
    }
    let Some(shape) = Shape::learn(teacher, &spans) else { return Ok(false) };
    let mut fast = Raw::default();
    if shape.read(bytes, &mut fast).is_none() {
        return Ok(false);
    }
    match serde_json::from_slice::<Raw<'_>>(bytes) {
        Ok(reference) if reference == fast => Ok(true),
        Ok(reference) => Err(format!("shape path read {fast:?}, serde_json {reference:?}")),
        Err(e) => Err(format!("shape path read {fast:?}, serde_json refused: {e}")),
    }
}

/// For tests: `Ok(true)` when the fast path took `bytes` and read exactly what `serde_json`
/// reads, `Ok(false)` when it left them to `serde_json`, `Err` when the two disagree.
#[doc(hidden)]
pub fn fast_path_agrees(bytes: &[u8]) -> Result<bool, String> {
    let mut fast = Raw::default();
    if scan(bytes, &mut fast).is_none() {
        return Ok(false);
    }
    match serde_json::from_slice::<Raw<'_>>(bytes) {
        Ok(reference) if reference == fast => Ok(true),
        Ok(reference) => Err(format!("fast path read {fast:?}, serde_json {reference:?}")),
        Err(e) => Err(format!("fast path read {fast:?}, serde_json refused: {e}")),
    }
}

struct Scanner<'a> {
    b: &'a [u8],
    i: usize,
}

const ONES: u64 = u64::from_ne_bytes([0x01; 8]);
const HIGHS: u64 = u64::from_ne_bytes([0x80; 8]);

/// Marks (with 0x80) the bytes of `x` that end a plain string: `"`, `\` or a control
/// character. Only the lowest marked byte is exact (a borrow can mark bytes above a true
/// one), which is the only one used.
#[inline(always)]
fn stops(x: u64) -> u64 {
    let zero = |v: u64| v.wrapping_sub(ONES) & !v & HIGHS;
    zero(x ^ (ONES * u64::from(b'"'))) | zero(x ^ (ONES * u64::from(b'\\'))) | (x.wrapping_sub(ONES * 0x20) & !x & HIGHS)
}

/// The eight bytes of `s` from `at`, as one word.
#[inline(always)]
fn word(s: &[u8], at: usize) -> u64 {
    let mut w = [0u8; 8];
    w.copy_from_slice(&s[at..at + 8]);
    u64::from_le_bytes(w)
}

/// Whether all eight bytes of `x` are ASCII digits: the high nibble is 3, and adding 6 to the
/// low nibble does not carry into it.
#[inline(always)]
fn eight_digits(x: u64) -> bool {
    const NIBBLES: u64 = u64::from_ne_bytes([0xF0; 8]);
    const THREES: u64 = u64::from_ne_bytes([0x30; 8]);
    (x & NIBBLES) == THREES && (x.wrapping_add(ONES * 6) & NIBBLES) == THREES
}

/// The value of eight ASCII digits read little-endian (the first digit in the lowest byte):
/// pairs, then fours, then the eight, each step one multiply and a mask (no carries: 99, 9 999
/// and 99 999 999 fit their lanes).
#[inline(always)]
fn eight_digits_value(x: u64) -> u64 {
    let x = x - ONES * u64::from(b'0');
    let x = (x.wrapping_mul(10) + (x >> 8)) & 0x00FF_00FF_00FF_00FF;
    let x = (x.wrapping_mul(100) + (x >> 16)) & 0x0000_FFFF_0000_FFFF;
    (x.wrapping_mul(10_000) + (x >> 32)) & 0xFFFF_FFFF
}

impl<'a> Scanner<'a> {
    #[inline(always)]
    fn peek(&self) -> Option<u8> {
        self.b.get(self.i).copied()
    }

    #[inline(always)]
    fn next(&mut self) -> Option<u8> {
        let c = self.peek()?;
        self.i += 1;
        Some(c)
    }

    #[inline(always)]
    fn expect(&mut self, c: u8) -> Option<()> {
        (self.next()? == c).then_some(())
    }

    /// JSON whitespace: space, tab, line feed, carriage return.
    #[inline(always)]
    fn ws(&mut self) {
        while matches!(self.peek(), Some(b' ' | b'\t' | b'\n' | b'\r')) {
            self.i += 1;
        }
    }

    #[inline(always)]
    fn null(&mut self) -> bool {
        if self.b[self.i..].starts_with(b"null") {
            self.i += 4;
            true
        } else {
            false
        }
    }

    /// One value of `field`: a string (or null) for the four names and the impression id, an
    /// integer for the two times, count and weights version, a decimal for reward and
    /// propensity.
    #[inline(always)]
    fn value(&mut self, field: u16, raw: &mut Raw<'a>) -> Option<()> {
        match field {
            0..=3 => {
                let v = if self.null() { None } else { Some(Cow::Borrowed(self.plain_string()?)) };
                match field {
                    0 => raw.event_id = v,
                    1 => raw.kind = v,
                    2 => raw.experiment = v,
                    _ => raw.arm = v,
                }
            }
            9 => raw.impression_id = if self.null() { None } else { Some(Cow::Borrowed(self.plain_string()?)) },
            4 => raw.ts_ms = if self.null() { None } else { Some(self.integer()?) },
            10 => raw.impression_ts_ms = if self.null() { None } else { Some(self.integer()?) },
            5 | 8 => {
                let v = if self.null() {
                    None
                } else {
                    Some(u64::try_from(self.integer()?).ok()?)
                };
                if field == 5 {
                    raw.count = v;
                } else {
                    raw.weights_version = v;
                }
            }
            _ => {
                let v = if self.null() { None } else { Some(self.plain_float()?) };
                if field == 6 {
                    raw.reward = v;
                } else {
                    raw.propensity = v;
                }
            }
        }
        Some(())
    }

    /// Takes `text` if the input continues with it; compared eight bytes at a time (the last
    /// eight overlapping the word before), or one at a time when shorter.
    #[inline(always)]
    fn text(&mut self, text: &[u8]) -> bool {
        let n = text.len();
        let Some(have) = self.b.get(self.i..self.i + n) else { return false };
        let same = if n >= 8 {
            let mut same = word(have, n - 8) == word(text, n - 8);
            let mut at = 0;
            while at + 8 < n {
                same &= word(have, at) == word(text, at);
                at += 8;
            }
            same
        } else {
            have.iter().zip(text).all(|(a, b)| a == b)
        };
        if same {
            self.i += n;
        }
        same
    }

    /// Takes `lit` if the input continues with it.
    #[inline(always)]
    fn literal(&mut self, lit: &[u8]) -> bool {
        if self.b[self.i..].starts_with(lit) {
            self.i += lit.len();
            true
        } else {
            false
        }
    }

    /// A key, quotes included: the field it names (its index in `Raw`'s order), `None` for any
    /// other string. A dispatch on the first letter, then one comparison with a constant,
    /// instead of finding the string's end first.
    #[inline(always)]
    fn key(&mut self) -> Option<u16> {
        let field = match self.b.get(self.i + 1)? {
            b'e' if self.literal(b"\"event_id\"") => 0,
            b'e' if self.literal(b"\"experiment\"") => 2,
            b'k' if self.literal(b"\"kind\"") => 1,
            b'a' if self.literal(b"\"arm\"") => 3,
            b't' if self.literal(b"\"ts_ms\"") => 4,
            b'c' if self.literal(b"\"count\"") => 5,
            b'r' if self.literal(b"\"reward\"") => 6,
            b'p' if self.literal(b"\"propensity\"") => 7,
            b'w' if self.literal(b"\"weights_version\"") => 8,
            b'i' if self.literal(b"\"impression_id\"") => 9,
            b'i' if self.literal(b"\"impression_ts_ms\"") => 10,
            _ => return None,
        };
        Some(field)
    }

    /// Where the bytes of a string without escapes or control characters lie, and whether they
    /// are all ASCII. Eight bytes at a time while eight remain, then one at a time.
    #[inline(always)]
    fn plain_span(&mut self) -> Option<(usize, usize, bool)> {
        self.expect(b'"')?;
        let start = self.i;
        let mut j = start;
        // The high bits of every byte before the end: zero for ASCII.
        let mut high = 0u64;
        let end = loop {
            if let Some(chunk) = self.b.get(j..j + 8) {
                let word = u64::from_le_bytes(chunk.try_into().ok()?);
                let m = stops(word);
                if m != 0 {
                    let k = m.trailing_zeros() / 8;
                    // The bytes below the first stop (none when it is the lowest byte).
                    high |= word & ((1u64 << (8 * k)) - 1);
                    break j + k as usize;
                }
                high |= word;
                j += 8;
            } else {
                let rest = &self.b[j..];
                let k = rest.iter().position(|&c| c == b'"' || c == b'\\' || c < 0x20)?;
                high |= rest[..k].iter().fold(0u64, |h, &c| h | u64::from(c));
                break j + k;
            }
        };
        if self.b[end] != b'"' {
            return None;
        }
        self.i = end + 1;
        Some((start, end, high & HIGHS == 0))
    }

    /// A string without escapes or control characters, borrowed; valid UTF-8 only. ASCII,
    /// the common case, needs no further check.
    #[inline(always)]
    fn plain_string(&mut self) -> Option<&'a str> {
        let (start, end, ascii) = self.plain_span()?;
        let bytes = &self.b[start..end];
        if ascii {
            // SAFETY: ASCII bytes are valid UTF-8.
            Some(unsafe { std::str::from_utf8_unchecked(bytes) })
        } else {
            std::str::from_utf8(bytes).ok()
        }
    }

    /// `-?(0|[1-9][0-9]*)` that fits an i64, not followed by a fraction or an exponent:
    /// (negative, value, digits). Up to 18 digits cannot overflow and are summed unchecked.
    #[inline(always)]
    fn number(&mut self) -> Option<(bool, i64, usize)> {
        let negative = self.peek() == Some(b'-');
        if negative {
            self.i += 1;
        }
        let start = self.i;
        // Eight digits at a time for the first sixteen (a millisecond timestamp has thirteen),
        // then one at a time; below 10^19 the sum cannot overflow a u64.
        let mut j = start;
        let mut sum = 0u64;
        while j - start < 16 {
            let Some(chunk) = self.b.get(j..j + 8) else { break };
            let word = u64::from_le_bytes(chunk.try_into().ok()?);
            if !eight_digits(word) {
                break;
            }
            sum = sum * 100_000_000 + eight_digits_value(word);
            j += 8;
        }
        while let Some(d @ b'0'..=b'9') = self.b.get(j).copied() {
            if j - start < 19 {
                sum = sum * 10 + u64::from(d - b'0');
            }
            j += 1;
        }
        let digits = j - start;
        if digits == 0 || (digits > 1 && self.b[start] == b'0') {
            return None;
        }
        let run = &self.b[start..start + digits];
        let v = if digits <= 18 {
            // Below 10^18, so it fits an i64.
            let v = sum as i64;
            if negative { -v } else { v }
        } else {
            let mut v: i64 = 0;
            for &d in run {
                let d = i64::from(d - b'0');
                v = v.checked_mul(10)?;
                v = if negative { v.checked_sub(d)? } else { v.checked_add(d)? };
            }
            v
        };
        self.i = start + digits;
        if matches!(self.peek(), Some(b'.' | b'e' | b'E')) {
            return None;
        }
        Some((negative, v, digits))
    }

    /// An integer field. `-0` is left to serde_json, which reads it as a float.
    #[inline(always)]
    fn integer(&mut self) -> Option<i64> {
        match self.number()? {
            (true, 0, _) => None,
            (_, v, _) => Some(v),
        }
    }

    /// A float field written `-?(0|[1-9][0-9]*)(\.[0-9]+)?` with at most 15 digits in all:
    /// the digits make an integer below 2^53 and the fraction a power of ten up to 10^15, both
    /// exact as f64, so one division gives the correctly rounded value — what serde_json and
    /// the standard library both give. Exponents are left to serde_json.
    #[inline(always)]
    fn plain_float(&mut self) -> Option<f64> {
        const POW10: [f64; 16] = [1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15];
        let negative = self.peek() == Some(b'-');
        if negative {
            self.i += 1;
        }
        let start = self.i;
        let mut sig: u64 = 0;
        let mut digits = 0usize;
        let mut fraction = 0usize;
        while let Some(d @ b'0'..=b'9') = self.peek() {
            sig = sig * 10 + u64::from(d - b'0');
            digits += 1;
            self.i += 1;
            if digits > 15 {
                return None;
            }
        }
        if digits == 0 || (digits > 1 && self.b[start] == b'0') {
            return None;
        }
        if self.peek() == Some(b'.') {
            self.i += 1;
            while let Some(d @ b'0'..=b'9') = self.peek() {
                sig = sig * 10 + u64::from(d - b'0');
                digits += 1;
                fraction += 1;
                self.i += 1;
                if digits > 15 {
                    return None;
                }
            }
            if fraction == 0 {
                return None;
            }
        }
        if matches!(self.peek(), Some(b'e' | b'E' | b'.')) {
            return None;
        }
        let v = sig as f64 / POW10[fraction];
        Some(if negative { -v } else { v })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_events_take_the_fast_path_and_read_as_serde_json_reads_them() {
        for plain in [
            r#"{"event_id":"imp-1","kind":"impression","experiment":"thumb-style","arm":"warm","ts_ms":1764547200000}"#,
            r#" { "event_id" : "r-1" , "kind":"reward","experiment":"x","arm":"y","ts_ms":-5,"reward":1 } "#,
            r#"{"event_id":"i","kind":"impression","experiment":"x","arm":"y","ts_ms":0,"count":3,"weights_version":17,"propensity":1}"#,
            r#"{"event_id":null,"kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":-0}"#,
            r#"{}"#,
            r#"{"event_id":"p","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"propensity":0.3333}"#,
            r#"{"event_id":"r","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":1.0}"#,
            r#"{"event_id":"r","kind":"reward","experiment":"x","arm":"y","ts_ms":9,"impression_id":"imp-1","impression_ts_ms":5}"#,
            r#"{"event_id":"r","kind":"reward","experiment":"x","arm":"y","ts_ms":9,"impression_ts_ms":null,"impression_id":null}"#,
            r#"{"event_id":"r","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":-0.00000000000001}"#,
            r#"{"event_id":"r","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":123456789.012345}"#,
            "{\"event_id\":\"caf\u{e9}\",\"kind\":\"impression\",\"experiment\":\"x\",\"arm\":\"y\",\"ts_ms\":9223372036854775807}",
        ] {
            assert_eq!(fast_path_agrees(plain.as_bytes()), Ok(true), "{plain}");
        }
    }

    /// The end of a string is found eight bytes at a time: every length, every position of a
    /// character that must stop the fast path (or must not), every alignment of the string.
    #[test]
    fn strings_end_where_serde_json_says_at_any_length_and_alignment() {
        for pad in 0..8 {
            for len in 0..24 {
                for at in 0..=len {
                    for (odd, plain) in [("\\\"", false), ("\\\\", false), ("\\u0041", false), ("\u{1}", false), ("\u{1f}", false), ("\u{7f}", true), ("\u{e9}", true), ("x", true)] {
                        let id: String = (0..len).map(|_| 'a').collect::<String>();
                        let id = format!("{}{odd}{}", &id[..at], &id[at..]);
                        let json = format!(r#"{}{{"event_id":"{id}","kind":"impression","experiment":"x","arm":"y","ts_ms":1}}"#, " ".repeat(pad));
                        assert_eq!(fast_path_agrees(json.as_bytes()), Ok(plain), "{json:?}");
                    }
                }
            }
        }
    }

    /// Integers are read eight digits at a time: every length up to past an i64, both signs,
    /// every digit in every place, and what may follow.
    #[test]
    fn integers_read_as_serde_json_reads_them_at_any_length() {
        for len in 1..=21 {
            for digit in b'0'..=b'9' {
                for sign in ["", "-"] {
                    for after in ["}", ",\"count\":2}", " }", ".5}", "e3}", "x}"] {
                        let mut n: Vec<u8> = (0..len).map(|i| b'1' + (i % 9) as u8).collect();
                        n[(usize::from(digit) * 7 + len) % len] = digit;
                        let n = String::from_utf8(n).unwrap();
                        let json = format!(r#"{{"event_id":"e","kind":"impression","experiment":"x","arm":"y","ts_ms":{sign}{n}{after}"#);
                        assert!(fast_path_agrees(json.as_bytes()).is_ok(), "{json}: {:?}", fast_path_agrees(json.as_bytes()));
                    }
                }
            }
        }
        let taken = br#"{"event_id":"e","kind":"impression","experiment":"x","arm":"y","ts_ms":1764547200123}"#;
        assert_eq!(fast_path_agrees(taken), Ok(true));
    }

    /// A shape takes an event written the same way with other values, and nothing else.
    #[test]
    fn a_shape_takes_events_written_alike_and_leaves_the_rest() {
        let teacher = br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1764547200123,"count":1,"propensity":0.25}"#;
        for (other, taken) in [
            (&br#"{"event_id":"i-22222222222","kind":"impression","experiment":"thumb.v2","arm":"warm","ts_ms":5,"count":30,"propensity":1}"#[..], true),
            (br#"{"event_id":null,"kind":"impression","experiment":"x","arm":"y","ts_ms":null,"count":null,"propensity":null}"#, true),
            ("{\"event_id\":\"caf\u{e9}\",\"kind\":\"impression\",\"experiment\":\"x\",\"arm\":\"y\",\"ts_ms\":-1,\"count\":1,\"propensity\":0.5}".as_bytes(), true),
            (br#"{"event_id":"i-1","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25}"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25} "#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25,"count":2}"#, false),
            (br#"{"event_id":"i\"1","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25}"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1.5,"count":1,"propensity":0.25}"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1e3,"count":1,"propensity":0.25}"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":"1","count":1,"propensity":0.25}"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25"#, false),
            (br#"{"event_id":"i-1","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":1}"#, false),
            (br#"{"event_id":"i-1","kind": "impression","experiment":"x","arm":"y","ts_ms":1,"count":1,"propensity":0.25}"#, false),
        ] {
            assert_eq!(shape_path_agrees(teacher, other), Ok(taken), "{}", String::from_utf8_lossy(other));
        }
        // The kind as a value (not one of the two) is a value of the shape like any other.
        let odd_kind = br#"{"event_id":"a","kind":"click","experiment":"x","arm":"y","ts_ms":1}"#;
        assert_eq!(shape_path_agrees(odd_kind, br#"{"event_id":"b","kind":"reward","experiment":"x","arm":"y","ts_ms":2}"#), Ok(true));
        // No shape is learned from what the general scan leaves to serde_json.
        assert_eq!(shape_path_agrees(br#"{"event_id":"a\u0041"}"#, br#"{"event_id":"abbbbbb"}"#), Ok(false));
    }

    #[test]
    fn eight_digits_at_once() {
        for n in [0u64, 1, 12_345_678, 99_999_999, 10_000_000, 90_817_263] {
            let w = u64::from_le_bytes(format!("{n:08}").as_bytes().try_into().unwrap());
            assert!(eight_digits(w));
            assert_eq!(eight_digits_value(w), n);
        }
        for odd in [*b"1234567/", *b"1234567:", *b"/1234567", *b":1234567", *b"1234 678", *b"\xb12345678"] {
            assert!(!eight_digits(u64::from_le_bytes(odd)), "{odd:?}");
        }
    }

    #[test]
    fn anything_unusual_is_left_to_serde_json() {
        for odd in [
            r#"{"event_id":"a\"b","kind":"impression","experiment":"x","arm":"y","ts_ms":1}"#,
            r#"{"event_id":"a","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":1e0}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":-0}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":01}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":-9223372036854775809}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"count":-1}"#,
            r#"{"event_id":"a","event_id":"b","kind":"impression","experiment":"x","arm":"y","ts_ms":1}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":1,"note":"hi"}"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":1}x"#,
            r#"{"event_id":"a","kind":"impression","experiment":"x","arm":"y","ts_ms":1,}"#,
            r#"{"event_id":"a	b","kind":"impression","experiment":"x","arm":"y","ts_ms":1}"#,
            r#"[1]"#,
            r#"{"event_id":"a","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":1234567890123456}"#,
            r#"{"event_id":"a","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":0.1234567890123456}"#,
            r#"{"event_id":"a","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":1.}"#,
            r#"{"event_id":"a","kind":"reward","experiment":"x","arm":"y","ts_ms":1,"reward":.5}"#,
        ] {
            assert_eq!(fast_path_agrees(odd.as_bytes()), Ok(false), "{odd}");
        }
        assert_eq!(fast_path_agrees(b"{\"event_id\":\"\xff\",\"ts_ms\":1}"), Ok(false), "invalid UTF-8");
    }
}
