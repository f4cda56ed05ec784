//! Incremental detokenisation: the text each new token adds, without decoding the whole output
//! again per token.
//!
//! Decoding a token on its own is wrong for most tokenizers (a word-piece continuation, a byte
//! of a multi-byte character, a leading-space marker all depend on their neighbours), and
//! decoding everything so far per token costs time quadratic in the output. The common practice
//! is a sliding window: decode the tokens from `prefix` (a point already streamed, a few tokens
//! back) to the end, and compare with the decoding of `prefix..read` (what that window had
//! produced before the new tokens). The difference is the new text. A window that ends in an
//! incomplete character (U+FFFD) sends nothing yet and waits for the next token; once text
//! goes out, the window moves forward, so each step decodes only a few tokens.

/// Decodes token ids to text (the tokenizer of the model, in production).
pub trait Decode {
    fn decode(&self, ids: &[u32]) -> String;
}

impl<F: Fn(&[u32]) -> String> Decode for F {
    fn decode(&self, ids: &[u32]) -> String {
        self(ids)
    }
}

/// The state of one output's detokenisation.
#[derive(Debug, Default, Clone)]
pub struct Detokenizer {
    ids: Vec<u32>,
    /// Start of the decoding window: text before it has been sent.
    prefix: usize,
    /// End of what the window had decoded when text last went out.
    read: usize,
}

impl Detokenizer {
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds a token and returns the text it completes (often empty while a character or a word
    /// piece is incomplete).
    pub fn push(&mut self, token: u32, decoder: &impl Decode) -> String {
        self.ids.push(token);
        let before = decoder.decode(&self.ids[self.prefix..self.read]);
        let now = decoder.decode(&self.ids[self.prefix..]);
        if now.len() > before.len() && !now.ends_with('\u{FFFD}') && now.starts_with(&before) {
            let delta = now[before.len()..].to_owned();
            self.prefix = self.read;
            self.read = self.ids.len();
            delta
        } else {
            String::new()
        }
    }

    /// The tokens pushed so far.
    pub fn ids(&self) -> &[u32] {
        &self.ids
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokenizers::Tokenizer;

    fn tiny_llama_tokenizer() -> Tokenizer {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("../tests/reference/fixtures/tiny-llama/tokenizer.json");
        Tokenizer::from_file(&path).unwrap()
    }

    #[test]
    fn streamed_pieces_join_to_the_whole_decoding() {
        let tok = tiny_llama_tokenizer();
        let decode = |ids: &[u32]| tok.decode(ids, true).unwrap();
        for text in [
            "Ridgeline Cycle Works fixes brakes, wheels and gears.",
            "café crème, naïve coöperation — ½ price ✓ 🚲🚲",
            "  spaces   and\nnew lines\t",
        ] {
            let ids = tok.encode(text, false).unwrap().get_ids().to_vec();
            let mut d = Detokenizer::new();
            let streamed: String = ids.iter().map(|&t| d.push(t, &decode)).collect();
            let whole = decode(&ids);
            // Everything but a trailing incomplete character is streamed, in order.
            assert!(whole.starts_with(&streamed), "{streamed:?} vs {whole:?}");
            assert_eq!(streamed, whole, "{text:?}");
        }
    }

    #[test]
    fn a_split_multibyte_character_waits_for_its_last_byte() {
        // A byte-level decoder: each id is one byte of UTF-8.
        let decode = |ids: &[u32]| {
            String::from_utf8_lossy(&ids.iter().map(|&b| b as u8).collect::<Vec<_>>()).into_owned()
        };
        let mut d = Detokenizer::new();
        let bytes = "a✓".as_bytes();
        let pieces: Vec<String> = bytes
            .iter()
            .map(|&b| d.push(u32::from(b), &decode))
            .collect();
        assert_eq!(pieces, vec!["a", "", "", "✓"]);
    }

    #[test]
    fn each_step_decodes_a_short_window() {
        use std::cell::Cell;
        let longest = Cell::new(0);
        let decode = |ids: &[u32]| {
            longest.set(longest.get().max(ids.len()));
            ids.iter().map(|_| 'x').collect::<String>()
        };
        let mut d = Detokenizer::new();
        for t in 0..1000 {
            d.push(t, &decode);
        }
        assert!(longest.get() <= 2, "window grew to {}", longest.get());
        assert_eq!(d.ids().len(), 1000);
    }
}
