"""A character-level tokenizer for the built-in tasks and the tiny models.

One token per character over a fixed alphabet, plus four special tokens::

    id 0 <pad>   id 1 <bos>   id 2 <eos>   id 3 <unk>   then one id per character

Built with the ``tokenizers`` library (a word-level model over single
characters: the pre-tokenizer isolates every character) and wrapped as a
``transformers`` fast tokenizer, so ``save_pretrained`` / ``from_pretrained``,
batching and ``decode`` work as with any hub model. Encoding prepends
``<bos>``; padding is on the left, which is what batched generation needs.
"""
from __future__ import annotations

import string

# The alphabet is part of the saved tokenizer; changing it changes token ids
# of every model trained with it, so only ever append to it.
ALPHABET = string.ascii_lowercase + string.digits + " ?=+-*/.,:;!'()#%<>_\n" + string.ascii_uppercase
SPECIAL_TOKENS = ("<pad>", "<bos>", "<eos>", "<unk>")
PAD_ID, BOS_ID, EOS_ID, UNK_ID = 0, 1, 2, 3


def char_vocab() -> dict[str, int]:
    """token -> id: the special tokens first, then the alphabet in order."""
    vocab = {tok: i for i, tok in enumerate(SPECIAL_TOKENS)}
    for ch in ALPHABET:
        vocab[ch] = len(vocab)
    return vocab


def build_tokenizer():
    """The character tokenizer, as a ``transformers`` fast tokenizer.

    Returns a tokenizer with ``vocab_size == len(char_vocab())``,
    ``pad/bos/eos/unk`` set, ``padding_side='left'``; ``tok("ab")["input_ids"]``
    is ``[1, id('a'), id('b')]``. Characters outside :data:`ALPHABET` map
    to ``<unk>``.
    """
    from tokenizers import Regex, Tokenizer, decoders, models, pre_tokenizers, processors
    from transformers import PreTrainedTokenizerFast

    vocab = char_vocab()
    core = Tokenizer(models.WordLevel(vocab, unk_token="<unk>"))
    # every character (newline included) becomes its own pre-token
    core.pre_tokenizer = pre_tokenizers.Split(Regex(r"[\s\S]"), behavior="isolated")
    core.decoder = decoders.Fuse()  # join characters back with no separator
    core.post_processor = processors.TemplateProcessing(
        single="<bos> $A", pair="<bos> $A $B", special_tokens=[("<bos>", BOS_ID)]
    )
    return PreTrainedTokenizerFast(
        tokenizer_object=core,
        pad_token="<pad>",
        bos_token="<bos>",
        eos_token="<eos>",
        unk_token="<unk>",
        padding_side="left",
        clean_up_tokenization_spaces=False,
    )
