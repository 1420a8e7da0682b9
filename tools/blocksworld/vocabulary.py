"""Tokenizers of the bundles, trained with the `tokenizers` package on captions.

Both keep to components the Rust `tokenizers` crate reads: a `Lowercase`
normalizer and the `Whitespace` pre-tokenizer (runs of word characters, and
runs of punctuation, become separate pieces). Padding and truncation are left
out of the saved file on purpose: befit pads and truncates itself.

- blocks bundles: a word-level model. `[PAD]` is id 0 and `[UNK]` id 1; no
  special tokens are added around a caption.
- clip-tiny: byte-free BPE with `</w>` word ends and an alphabet of printable
  ASCII, so any English word splits into known pieces; a template adds
  `<|startoftext|>` (id 0) before and `<|endoftext|>` (id 1) after every
  caption. Padding reuses `<|endoftext|>`, as CLIP tokenizers usually do.
"""

from __future__ import annotations

import string
from typing import Iterable

from tokenizers import Tokenizer, models, normalizers, pre_tokenizers, processors, trainers

PAD, UNK = "[PAD]", "[UNK]"
BOS, EOS, BPE_UNK = "<|startoftext|>", "<|endoftext|>", "<|unk|>"


def word_level(corpus: Iterable[str]) -> Tokenizer:
    """Word-level tokenizer over every word and punctuation mark of `corpus`."""
    tok = Tokenizer(models.WordLevel(unk_token=UNK))
    tok.normalizer = normalizers.Lowercase()
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    tok.train_from_iterator(corpus, trainers.WordLevelTrainer(special_tokens=[PAD, UNK], min_frequency=1))
    assert tok.token_to_id(PAD) == 0 and tok.token_to_id(UNK) == 1
    return tok


def bpe(corpus: Iterable[str], vocab_size: int = 400) -> Tokenizer:
    """BPE tokenizer with CLIP's begin and end tokens."""
    tok = Tokenizer(models.BPE(unk_token=BPE_UNK, end_of_word_suffix="</w>"))
    tok.normalizer = normalizers.Lowercase()
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    alphabet = [c for c in string.printable if not c.isspace() and not c.isupper()]
    trainer = trainers.BpeTrainer(
        vocab_size=vocab_size,
        special_tokens=[BOS, EOS, BPE_UNK],
        initial_alphabet=alphabet,
        end_of_word_suffix="</w>",
        show_progress=False,
    )
    # Every character also once as a whole word, so that word-final pieces
    # ("z</w>") exist and unseen words never fall back to <|unk|>.
    tok.train_from_iterator(list(corpus) + [" ".join(alphabet)], trainer)
    bos, eos = tok.token_to_id(BOS), tok.token_to_id(EOS)
    assert (bos, eos) == (0, 1)
    tok.post_processor = processors.TemplateProcessing(
        single=f"{BOS} $A {EOS}", special_tokens=[(BOS, bos), (EOS, eos)]
    )
    return tok
