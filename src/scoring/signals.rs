//! What a caption's text alone says about degeneration: its words, the share
//! of words and bigrams repeating an earlier one, and distinct-n over a set
//! of captions (Li et al. 2016). Pure functions; the guard and the run watch
//! both read them, so a caption is measured the same way in both.

use std::collections::HashSet;

/// The caption's words: maximal runs of letters and digits, lower-cased.
/// Punctuation separates words and is not one, so "cube, cube" repeats.
pub fn words(text: &str) -> Vec<String> {
    text.split(|c: char| !c.is_alphanumeric())
        .filter(|w| !w.is_empty())
        .map(str::to_lowercase)
        .collect()
}

/// Share of the items that equal an earlier item of the same sequence; 0 for
/// an empty sequence.
fn share_repeating<T: std::hash::Hash + Eq>(items: impl Iterator<Item = T>) -> f32 {
    let mut seen = HashSet::new();
    let (mut total, mut repeats) = (0usize, 0usize);
    for item in items {
        total += 1;
        if !seen.insert(item) {
            repeats += 1;
        }
    }
    if total == 0 {
        0.0
    } else {
        repeats as f32 / total as f32
    }
}

/// Share of word tokens that repeat an earlier word of the caption.
pub fn repeated_words(words: &[String]) -> f32 {
    share_repeating(words.iter())
}

/// Share of word bigrams (consecutive pairs) that repeat an earlier bigram of
/// the caption; 0 when the caption has fewer than two words.
pub fn repeated_bigrams(words: &[String]) -> f32 {
    share_repeating(words.windows(2))
}

/// Distinct and total n-grams over many captions, so distinct-n can be
/// accumulated caption by caption.
#[derive(Debug, Clone, Default)]
pub struct NgramCount {
    seen: HashSet<Vec<String>>,
    total: u64,
}

impl NgramCount {
    /// Counts the n-grams of one caption's words.
    pub fn add(&mut self, words: &[String], n: usize) {
        if n == 0 {
            return;
        }
        for gram in words.windows(n) {
            self.total += 1;
            self.seen.insert(gram.to_vec());
        }
    }

    /// The distinct n-grams seen.
    pub fn grams(&self) -> impl Iterator<Item = &Vec<String>> {
        self.seen.iter()
    }

    /// How many n-grams were counted, repeats included.
    pub fn total(&self) -> u64 {
        self.total
    }
}

/// distinct-n of Li et al. 2016 (section 4.3, "A Diversity-Promoting
/// Objective Function for Neural Conversation Models"): distinct n-grams
/// divided by all n-grams, over a set of captions; 0 when there are none.
pub fn distinct_n(distinct: u64, total: u64) -> f64 {
    if total == 0 {
        0.0
    } else {
        distinct as f64 / total as f64
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn words_split_on_punctuation_and_fold_case() {
        assert_eq!(
            words("A red cube, Red cube!"),
            ["a", "red", "cube", "red", "cube"]
        );
        assert!(words("  ,, ").is_empty());
    }

    #[test]
    fn repetition_by_hand() {
        // "red cube red cube red": words 5, repeats at positions 3, 4, 5 -> 3/5;
        // bigrams (red cube)(cube red)(red cube)(cube red): 2 of 4 repeat.
        let w = words("red cube red cube red");
        assert!((repeated_words(&w) - 0.6).abs() < 1e-6);
        assert!((repeated_bigrams(&w) - 0.5).abs() < 1e-6);
        assert_eq!(repeated_bigrams(&words("one")), 0.0);
        assert_eq!(repeated_words(&[]), 0.0);
    }

    #[test]
    fn distinct_n_over_captions_by_hand() {
        // Li et al. 2016: distinct-1 over {"a red cube", "a red ring"} is
        // {a, red, cube, ring} / 6 = 4/6; distinct-2 {a red, red cube, red ring} / 4.
        let (mut one, mut two) = (NgramCount::default(), NgramCount::default());
        for c in ["a red cube", "a red ring"] {
            one.add(&words(c), 1);
            two.add(&words(c), 2);
        }
        assert!((distinct_n(one.grams().count() as u64, one.total()) - 4.0 / 6.0).abs() < 1e-12);
        assert!((distinct_n(two.grams().count() as u64, two.total()) - 0.75).abs() < 1e-12);
        assert_eq!(distinct_n(0, 0), 0.0);
    }
}
