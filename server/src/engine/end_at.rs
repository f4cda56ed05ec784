//! Ending a generation at a text or a token the request names (`end_at`), without ever sending
//! the text that ends it.
//!
//! The decoded output arrives piece by piece (see [`super::detok`]); an end text may be split
//! across pieces. So text goes out only when no end text can still begin in it: the longest end
//! of the unsent text that is the start of some end text is held back until the next piece
//! settles it (the end text completes, or the text turns out to be ordinary and goes out). When
//! an end text completes, everything before it goes out and the generation ends; at any other
//! end (end of sequence, token limit) what was held back goes out with the rest.

/// What a request asked to end at: texts (matched in the decoded output) and token ids (the
/// token is sampled, not part of the output).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct EndAt {
    pub texts: Vec<String>,
    pub token_ids: Vec<u32>,
}

/// What one new piece of decoded text does.
#[derive(Debug, PartialEq, Eq)]
pub enum Step {
    /// Send this text (possibly empty) and go on.
    Send(String),
    /// Send this text (possibly empty), then end: end text `index` completed.
    End { send: String, index: usize },
}

/// The unsent text of one generation, held against the request's end texts.
#[derive(Debug, Default)]
pub struct Holder {
    held: String,
}

impl Holder {
    /// Takes the next decoded piece; says what to send now and whether an end text completed.
    pub fn push(&mut self, texts: &[String], piece: &str) -> Step {
        self.held.push_str(piece);
        if texts.is_empty() {
            return Step::Send(std::mem::take(&mut self.held));
        }
        // The earliest complete end text in the unsent text (nothing sent can begin one: its
        // possible beginnings were held back), the first listed one on a tie.
        let found = texts
            .iter()
            .enumerate()
            .filter_map(|(i, t)| self.held.find(t.as_str()).map(|at| (at, i)))
            .min();
        if let Some((at, index)) = found {
            let send = self.held[..at].to_owned();
            self.held.clear();
            return Step::End { send, index };
        }
        // Hold back the longest end of the unsent text that begins some end text.
        let keep = self
            .held
            .char_indices()
            .map(|(at, _)| at)
            .find(|&at| {
                let rest = &self.held[at..];
                texts.iter().any(|t| t.starts_with(rest))
            })
            .unwrap_or(self.held.len());
        let send = self.held[..keep].to_owned();
        self.held.drain(..keep);
        Step::Send(send)
    }

    /// The text held back so far (sent at the end when no end text completed).
    pub fn held(&self) -> &str {
        &self.held
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run(texts: &[&str], pieces: &[&str]) -> (Vec<String>, Option<usize>, String) {
        let texts: Vec<String> = texts.iter().map(|t| t.to_string()).collect();
        let mut h = Holder::default();
        let mut sent = Vec::new();
        for p in pieces {
            match h.push(&texts, p) {
                Step::Send(s) => sent.push(s),
                Step::End { send, index } => {
                    sent.push(send);
                    return (sent, Some(index), String::new());
                }
            }
        }
        (sent, None, h.held().to_owned())
    }

    #[test]
    fn an_end_text_split_across_pieces_is_never_sent() {
        let (sent, end, _) = run(&["END"], &["abc E", "N", "D tail"]);
        assert_eq!(sent, vec!["abc ", "", ""]);
        assert_eq!(end, Some(0));
        let (sent, end, _) = run(&["\n\n"], &["one\n", "\ntwo"]);
        assert_eq!(sent.concat(), "one");
        assert_eq!(end, Some(0));
    }

    #[test]
    fn a_false_start_is_released_once_it_cannot_be_an_end_text() {
        let (sent, end, held) = run(&["END"], &["x E", "Nx", "y"]);
        assert_eq!(sent, vec!["x ", "ENx", "y"]);
        assert_eq!((end, held.as_str()), (None, ""));
        // At the end of the output, what is still held goes out with the rest.
        let (sent, end, held) = run(&["END"], &["x EN"]);
        assert_eq!(
            (sent.concat(), end, held.as_str()),
            ("x ".into(), None, "EN")
        );
    }

    #[test]
    fn the_earliest_end_text_wins_and_multibyte_text_is_cut_on_character_boundaries() {
        let (sent, end, _) = run(&["later", "é!"], &["café! and later"]);
        assert_eq!((sent.concat(), end), ("caf".into(), Some(1)));
        let (sent, _, held) = run(&["éz"], &["caf", "é"]);
        assert_eq!((sent.concat(), held.as_str()), ("caf".into(), "é"));
    }

    #[test]
    fn without_end_texts_everything_goes_out_at_once() {
        let (sent, end, held) = run(&[], &["a", "b"]);
        assert_eq!(
            (sent, end, held.as_str()),
            (vec!["a".into(), "b".into()], None, "")
        );
    }
}
