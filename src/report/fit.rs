//! Fitting a long chain or path into a line of the terminal's width: keep
//! both ends, as many pieces of each as fit, and say how many were left out.

/// Joins `pieces` (each carrying its own separator, e.g. `" → 'b'"`, and
/// the number of nodes or hops it stands for) into at most `width`
/// characters: all of them when they fit, else the first and the last
/// pieces, alternately, as many as fit beside a marker `marker(n)` that
/// stands for the n nodes or hops in between. The first and the last piece
/// are always kept, so a width too small for them is exceeded; a marker that
/// would be no shorter than what it replaces is not used. `None` for `width`
/// keeps everything.
pub fn fit(
    pieces: &[(String, usize)],
    width: Option<usize>,
    marker: impl Fn(usize) -> String,
) -> String {
    let length = |text: &str| text.chars().count();
    let concat = |pieces: &[(String, usize)]| -> String {
        pieces.iter().map(|(text, _)| text.as_str()).collect()
    };
    let total: usize = pieces.iter().map(|(piece, _)| length(piece)).sum();
    let Some(width) = width else {
        return concat(pieces);
    };
    if total <= width || pieces.len() <= 2 {
        return concat(pieces);
    }
    let between = |head: usize, tail: usize| -> usize {
        pieces[head..pieces.len() - tail]
            .iter()
            .map(|(_, count)| count)
            .sum()
    };
    let (mut head, mut tail) = (1, 1);
    let used = |head: usize, tail: usize| {
        let kept: usize = pieces[..head]
            .iter()
            .chain(&pieces[pieces.len() - tail..])
            .map(|(piece, _)| length(piece))
            .sum();
        kept + length(&marker(between(head, tail)))
    };
    loop {
        let room = pieces.len() - head - tail;
        if room == 0 {
            break;
        }
        // Grow the shorter end first, so both ends stay in view.
        let grew = if head <= tail {
            if used(head + 1, tail) <= width {
                head += 1;
                true
            } else if used(head, tail + 1) <= width {
                tail += 1;
                true
            } else {
                false
            }
        } else if used(head, tail + 1) <= width {
            tail += 1;
            true
        } else if used(head + 1, tail) <= width {
            head += 1;
            true
        } else {
            false
        };
        if !grew {
            break;
        }
    }
    let mut out = concat(&pieces[..head]);
    if head + tail < pieces.len() {
        out.push_str(&marker(between(head, tail)));
    }
    out.push_str(&concat(&pieces[pieces.len() - tail..]));
    // A marker longer than what it stands for shortens nothing.
    if length(&out) >= total {
        return concat(pieces);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chain(n: usize) -> Vec<(String, usize)> {
        (0..n)
            .map(|k| {
                if k == 0 {
                    (format!("n{k:02}"), 1)
                } else {
                    (format!(" → n{k:02}"), 1)
                }
            })
            .collect()
    }

    fn concat(pieces: &[(String, usize)]) -> String {
        pieces.iter().map(|(text, _)| text.as_str()).collect()
    }

    #[test]
    fn a_long_chain_keeps_both_ends_within_the_width() {
        let pieces = chain(40);
        let marker = |k: usize| format!(" → … {k} more");
        let text = fit(&pieces, Some(60), marker);
        assert!(text.chars().count() <= 60, "{text}");
        assert!(text.starts_with("n00 → n01"), "{text}");
        assert!(text.ends_with("n38 → n39"), "{text}");
        let left_out: usize = text
            .split("… ")
            .nth(1)
            .and_then(|rest| rest.split(' ').next())
            .and_then(|k| k.parse().ok())
            .unwrap();
        let kept = text.matches('n').count();
        assert_eq!(kept + left_out, 40, "{text}");
        assert_eq!(fit(&pieces, None, marker), concat(&pieces));
        assert_eq!(fit(&chain(3), Some(10), marker), concat(&chain(3)));
    }
}
