//! Where each node is declared in trace text: one pass over the text finds
//! every node's `id` key, so any number of problems are placed in time
//! linear in the file.

/// An `id` key found in the text.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct IdKey {
    /// 1-based line and column (in characters) of the key.
    pub(crate) place: (usize, usize),
    /// Byte range of the id's value as written: a string's content or an
    /// integer's digits.
    pub(crate) value: (usize, usize),
}

/// Every `id` key in `text`, in file order, for RON or JSON. Outside string literals, comments and character
/// literals, a key is the identifier `id` or the string `"id"` followed by
/// `:`; only node records have an `id` field, so the k-th key found belongs
/// to the k-th node.
pub(crate) fn id_keys(text: &str) -> Vec<IdKey> {
    let bytes = text.as_bytes();
    let mut scan = Scan {
        bytes,
        at: 0,
        line: 1,
        column: 1,
    };
    let mut keys = Vec::new();
    while scan.at < bytes.len() {
        let start = (scan.line, scan.column);
        match bytes[scan.at] {
            b'"' => {
                let content = scan.string();
                if &bytes[content.0..content.1] == b"id" && scan.colon_follows() {
                    keys.push(scan.key_at(start));
                }
            }
            b'/' if bytes.get(scan.at + 1) == Some(&b'/') => scan.line_comment(),
            b'/' if bytes.get(scan.at + 1) == Some(&b'*') => scan.block_comment(),
            b'\'' => scan.char_literal(),
            b'r' if scan.raw_string_starts() => scan.raw_string(),
            b if is_ident(b) => {
                let word = scan.at;
                while scan.at < bytes.len() && is_ident(bytes[scan.at]) {
                    scan.advance();
                }
                if &bytes[word..scan.at] == b"id" && scan.colon_follows() {
                    keys.push(scan.key_at(start));
                }
            }
            _ => scan.advance(),
        }
    }
    keys
}

fn is_ident(b: u8) -> bool {
    b.is_ascii_alphanumeric() || b == b'_' || b >= 0x80
}

/// A cursor over the text that keeps the line and the column (in
/// characters) as it moves.
struct Scan<'t> {
    bytes: &'t [u8],
    at: usize,
    line: usize,
    column: usize,
}

impl Scan<'_> {
    fn advance(&mut self) {
        let b = self.bytes[self.at];
        self.at += 1;
        if b == b'\n' {
            self.line += 1;
            self.column = 1;
        } else if b & 0xC0 != 0x80 {
            // Continuation bytes belong to the character already counted.
            self.column += 1;
        }
    }

    /// Skips a `"`-quoted string with backslash escapes; returns the byte
    /// range of its content.
    fn string(&mut self) -> (usize, usize) {
        self.advance();
        let start = self.at;
        while self.at < self.bytes.len() {
            match self.bytes[self.at] {
                b'\\' => {
                    self.advance();
                    if self.at < self.bytes.len() {
                        self.advance();
                    }
                }
                b'"' => {
                    let end = self.at;
                    self.advance();
                    return (start, end);
                }
                _ => self.advance(),
            }
        }
        (start, self.at)
    }

    /// Whether the next character after spaces is `:` (not `::`).
    fn colon_follows(&self) -> bool {
        let rest = &self.bytes[self.at..];
        let mut next = rest.iter().skip_while(|b| b.is_ascii_whitespace());
        next.next() == Some(&b':') && next.next() != Some(&b':')
    }

    /// The key at `place`, whose `:` follows the cursor, with its value's
    /// byte range (empty when the value is neither a string nor a number).
    fn key_at(&self, place: (usize, usize)) -> IdKey {
        let mut at = self.at;
        let skip = |at: &mut usize| {
            while *at < self.bytes.len() && self.bytes[*at].is_ascii_whitespace() {
                *at += 1;
            }
        };
        skip(&mut at);
        at += 1; // the colon
        skip(&mut at);
        let value = match self.bytes.get(at) {
            Some(b'"') => {
                let start = at + 1;
                let mut end = start;
                while end < self.bytes.len() && self.bytes[end] != b'"' {
                    end += if self.bytes[end] == b'\\' { 2 } else { 1 };
                }
                (start, end.min(self.bytes.len()))
            }
            Some(b) if b.is_ascii_digit() || *b == b'-' => {
                let end = self.bytes[at + 1..]
                    .iter()
                    .position(|b| !b.is_ascii_digit())
                    .map_or(self.bytes.len(), |n| at + 1 + n);
                (at, end)
            }
            _ => (at, at),
        };
        IdKey { place, value }
    }

    fn line_comment(&mut self) {
        while self.at < self.bytes.len() && self.bytes[self.at] != b'\n' {
            self.advance();
        }
    }

    /// RON block comments nest.
    fn block_comment(&mut self) {
        let mut depth = 0usize;
        while self.at < self.bytes.len() {
            if self.bytes[self.at..].starts_with(b"/*") {
                depth += 1;
                self.advance();
                self.advance();
            } else if self.bytes[self.at..].starts_with(b"*/") {
                depth -= 1;
                self.advance();
                self.advance();
                if depth == 0 {
                    return;
                }
            } else {
                self.advance();
            }
        }
    }

    /// A RON character literal such as `'a'` or `'\''`.
    fn char_literal(&mut self) {
        self.advance();
        while self.at < self.bytes.len() {
            match self.bytes[self.at] {
                b'\\' => {
                    self.advance();
                    if self.at < self.bytes.len() {
                        self.advance();
                    }
                }
                b'\'' | b'\n' => {
                    self.advance();
                    return;
                }
                _ => self.advance(),
            }
        }
    }

    /// `r"` or `r#..#"` at the cursor, not inside an identifier.
    fn raw_string_starts(&self) -> bool {
        if self.at > 0 && is_ident(self.bytes[self.at - 1]) {
            return false;
        }
        let hashes = self.bytes[self.at + 1..]
            .iter()
            .take_while(|&&b| b == b'#')
            .count();
        self.bytes.get(self.at + 1 + hashes) == Some(&b'"')
    }

    /// A RON raw string `r#"..."#`: no escapes, ends at `"` and as many `#`.
    fn raw_string(&mut self) {
        self.advance();
        let mut hashes = 0;
        while self.bytes[self.at] == b'#' {
            hashes += 1;
            self.advance();
        }
        self.advance();
        while self.at < self.bytes.len() {
            if self.bytes[self.at] == b'"'
                && self.bytes[self.at + 1..]
                    .iter()
                    .take(hashes)
                    .filter(|&&b| b == b'#')
                    .count()
                    == hashes
            {
                for _ in 0..=hashes {
                    self.advance();
                }
                return;
            }
            self.advance();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn places(text: &str) -> Vec<(usize, usize)> {
        id_keys(text).iter().map(|key| key.place).collect()
    }

    fn values(text: &str) -> Vec<&str> {
        id_keys(text)
            .iter()
            .map(|key| &text[key.value.0..key.value.1])
            .collect()
    }

    #[test]
    fn keys_are_found_in_both_encodings() {
        let ron = "(\n  nodes: [\n    (id: \"a\", op: \"input\"),\n    (id: \"b\", op: \"neg\"),\n  ],\n)";
        assert_eq!(places(ron), vec![(3, 6), (4, 6)]);
        assert_eq!(values(ron), vec!["a", "b"]);
        let json = "{\n  \"nodes\": [\n    {\"id\": \"a\"},\n    {\"id\" : 12}\n  ]\n}";
        assert_eq!(places(json), vec![(3, 6), (4, 6)]);
        assert_eq!(values(json), vec!["a", "12"]);
    }

    #[test]
    fn strings_comments_and_lookalikes_are_skipped() {
        let ron = concat!(
            "( title: \"(id: \\\"x\\\")\", // id: in a comment\n",
            "  description: r#\"raw \"id\": here\"#, /* id: /* nested id: */ id: */\n",
            "  nodes: [(id: 'i', idx: 1, grid: 2, é: 3,\n",
            "  id : \"é\"), (ids: 1, id: 3)],\n)",
        );
        assert_eq!(places(ron), vec![(3, 12), (4, 3), (4, 23)]);
        assert_eq!(values(ron), vec!["", "é", "3"]);
        // Columns count characters, not bytes.
        assert_eq!(places("{\"é\": 1, \"id\": 2}"), vec![(1, 10)]);
        // A string value "id" is not a key.
        assert_eq!(
            places("{\"op\": \"id\", \"id\": \"i\\\"d\"}"),
            vec![(1, 14)]
        );
        assert_eq!(
            values("{\"op\": \"id\", \"id\": \"i\\\"d\"}"),
            vec!["i\\\"d"]
        );
    }
}
