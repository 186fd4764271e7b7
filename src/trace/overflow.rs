//! JSON number literals beyond the range of f64 (`1e400`) read as ±inf, as
//! they do in RON: IEEE 754-2019, §7.4, rounds a decimal conversion that
//! overflows to infinity, and Python's `json` and JavaScript's `JSON.parse`
//! read such literals as infinity (recalled from memory). serde_json refuses
//! them instead, so the loader rewrites them before parsing again.

/// `text` with every number literal outside string literals that overflows
/// f64 replaced by the string `"inf"` or `"-inf"`, padded with spaces to the
/// literal's length so every line and column stays where it was. `None`
/// when there is none to replace.
pub(crate) fn widen_overflowing_numbers(text: &str) -> Option<String> {
    let bytes = text.as_bytes();
    let mut out: Option<Vec<u8>> = None;
    let mut at = 0;
    while at < bytes.len() {
        match bytes[at] {
            b'"' => {
                at += 1;
                while at < bytes.len() && bytes[at] != b'"' {
                    at += if bytes[at] == b'\\' { 2 } else { 1 };
                }
                at += 1;
            }
            b'-' | b'0'..=b'9' => {
                let start = at;
                while at < bytes.len()
                    && matches!(bytes[at], b'0'..=b'9' | b'-' | b'+' | b'.' | b'e' | b'E')
                {
                    at += 1;
                }
                let literal = &text[start..at];
                if let Ok(x) = literal.parse::<f64>()
                    && x.is_infinite()
                {
                    // An overflowing literal is at least as long as its
                    // replacement: `9e308` against `"inf"`, `-9e308` against `"-inf"`.
                    let word: &[u8] = if x > 0.0 { b"\"inf\"" } else { b"\"-inf\"" };
                    let out = out.get_or_insert_with(|| bytes.to_vec());
                    out[start..start + word.len()].copy_from_slice(word);
                    out[start + word.len()..at].fill(b' ');
                }
            }
            _ => at += 1,
        }
    }
    out.map(|out| String::from_utf8(out).expect("only ASCII was replaced by ASCII"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn overflowing_literals_become_strings_in_place() {
        let text =
            r#"{"a": 1e400, "b": [-2E+999, 1.5e308, 9e308], "c": "1e400", "d": "\"", "e": 1e-400}"#;
        let widened = widen_overflowing_numbers(text).unwrap();
        assert_eq!(
            widened,
            r#"{"a": "inf", "b": ["-inf" , 1.5e308, "inf"], "c": "1e400", "d": "\"", "e": 1e-400}"#
        );
        assert_eq!(widened.len(), text.len());
        assert_eq!(
            widen_overflowing_numbers(r#"{"a": 1.7976931348623157e308}"#),
            None
        );
    }
}
