"""Your own prompts as a task: a JSONL file, a local ``datasets`` dataset, or a ``datasets.Dataset``.

::

    task = UserTask(data="prompts.jsonl", prompt_field="question", tests_field="tests")
    train, held = task.split(n_train=800, n_eval=100, seed=0)
    verify = task.bind_verifier(UnitTests(field="tests"), train + held)

In a recipe: ``task = "user"`` and the same names under ``[task_params]``.

data:            a ``.jsonl`` file (read line by line; errors name the line), a
                 ``.csv`` file (Python's csv module: every cell the text as
                 written), a ``.json`` / ``.parquet`` file (read through
                 ``datasets``), a directory written by ``Dataset.save_to_disk``
                 (read with ``datasets.load_from_disk``), or, from Python, a
                 ``datasets.Dataset`` / ``DatasetDict`` object. Local only.
prompt_field:    the column holding the prompt text (the only required field).
answer_field:    optional column of exact answers (the ``exact`` verifier
                 compares the whitespace-normalised response with it): a
                 string, or an integer read as its decimal text; a null or
                 blank cell is a missing answer, a float or boolean an error
                 naming the row (see :func:`~bonft.tasks.prompts.answer_text`).
reference_field: optional column of full reference responses (what a warm
                 start trains on).
tests_field:     optional column of unit tests (see
                 :class:`~bonft.verifiers.fields.UnitTests`).
extra_fields:    columns handed to verifiers that read rows (None: every
                 column). The prompt, answer, reference and tests fields are
                 always handed over.
dataset_split:   which split of a ``DatasetDict`` (needed when it has several).
chat_template:   render each prompt with the tokenizer's chat template (a user
                 turn, after an optional ``system`` message, then the
                 generation prompt). Needs ``tokenizer`` (an object or a local
                 directory); an error when it has no chat template.
system:          the system message (only with ``chat_template``).

No field other than the prompt is required until a verifier needs one: then
:meth:`UserTask.bind_verifier` checks every row and names the field, the row
and why. With a chat template, the prompt text of every example is the rendered
text, so sampling, the training forward and evaluation tokenize the same
string; the tokenizer's own start token is not doubled (checked against
``apply_chat_template(tokenize=True)``). Verifiers receive that rendered text as
``prompts``; the raw prompt is in each row under ``prompt_field``.

Caution: a model trained against any verifier learns what that verifier
accepts (reward hacking); evaluate with a checker you trust (recipe key ``eval_verifier``,
see docs/training.md), and run model-written code only in a sandbox.
"""
from __future__ import annotations

import csv
import os
import random
import tempfile
from pathlib import Path
from typing import Any, Callable, Sequence

from bonft._core.checks import check_int
from bonft.tasks.base import ExactVerifier, Example, Task, _check_examples
from bonft.tasks.prompts import _read_jsonl, answer_text, normalize_text, require_answers
from bonft.verifiers.fields import bind_rows

FILE_FORMATS = {".json": "json", ".parquet": "parquet"}  # read through datasets; .jsonl and .csv: our readers


def _is_dataset(obj: Any) -> bool:
    return type(obj).__module__.startswith("datasets.") and hasattr(obj, "column_names")


def _load_rows(data: Any, dataset_split: str | None) -> tuple[list[tuple[dict, str]], str, list[str]]:
    """``([(row, where)], name of the data, columns)`` from any accepted ``data``."""
    if _is_dataset(data):
        return _dataset_rows(data, dataset_split, "the dataset")
    if not isinstance(data, (str, os.PathLike)):
        raise TypeError(f"data must be a path (JSONL/JSON/CSV/Parquet file or a saved datasets directory) or a "
                        f"datasets.Dataset, got {type(data).__name__}")
    path = Path(data)
    if str(data) == "":
        raise ValueError("data must name a JSONL/JSON/CSV/Parquet file or a saved datasets directory "
                         "(recipe: [task_params] data = ...), got ''")
    if path.is_dir():
        if not any((path / f).is_file() for f in ("dataset_info.json", "state.json", "dataset_dict.json")):
            raise ValueError(f"data {str(path)!r} is a directory but not one written by datasets' save_to_disk "
                             f"(no dataset_info.json, state.json or dataset_dict.json); give a file or a saved dataset")
        import datasets

        return _dataset_rows(datasets.load_from_disk(str(path)), dataset_split, repr(str(path)))
    if not path.is_file():
        raise FileNotFoundError(f"data must be a local file or directory, got {str(path)!r} (no such file)")
    if dataset_split is not None:
        raise ValueError(f"dataset_split applies to a DatasetDict only, got dataset_split={dataset_split!r} with the file {str(path)!r}")
    suffix = path.suffix.lower()
    if suffix == ".jsonl":
        numbered = _read_jsonl(path)
        cols = sorted(set().union(*(row for _, row in numbered))) if numbered else []
        return [(row, f"{path} line {no}") for no, row in numbered], repr(str(path)), cols
    if suffix == ".csv":
        numbered = _read_csv(path)
        cols = list(numbered[0][1]) if numbered else []
        return [(row, f"{path} line {no}") for no, row in numbered], repr(str(path)), cols
    if suffix not in FILE_FORMATS:
        raise ValueError(f"data must be a .jsonl, .json, .csv or .parquet file or a saved datasets directory, got {str(path)!r}")
    import datasets

    with tempfile.TemporaryDirectory(prefix="bonft-data-") as cache:
        ds = datasets.load_dataset(FILE_FORMATS[suffix], data_files=str(path), split="train", cache_dir=cache,
                                   keep_in_memory=True)
        return _dataset_rows(ds, None, repr(str(path)))


def _read_csv(path: Path) -> list[tuple[int, dict]]:
    """``[(line, row)]`` of a CSV file with a header line, every cell the text as written (Python's csv module);
    ``line``: the row's first line (a quoted cell may hold line breaks).

    A reader that infers types changes text: a column of integers with one blank cell becomes floats, so an
    answer ``1`` would read as ``'1.0'``. Cells stay strings here (a blank one ''); a verifier converts them.
    """
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.reader(f)
            header = next(reader, None)
            if header is None:
                return []
            if len(set(header)) != len(header) or not all(header):
                raise ValueError(f"data {str(path)!r} line 1: the header must name every column once, got {header}")
            out = []
            start = reader.line_num + 1  # a row's first line: a quoted cell may span several
            for cells in reader:
                line, start = start, reader.line_num + 1
                if not cells:
                    continue  # a blank line
                if len(cells) != len(header):
                    raise ValueError(f"data {str(path)!r} line {line}: {len(cells)} cells, but the header "
                                     f"names {len(header)} columns")
                out.append((line, dict(zip(header, cells))))
    except UnicodeDecodeError as e:
        raise ValueError(f"data {str(path)!r} is not UTF-8 text (byte {e.object[e.start]:#04x}); save it as UTF-8") from None
    except csv.Error as e:
        raise ValueError(f"data {str(path)!r}: not valid CSV ({e})") from None
    return out


def _dataset_rows(ds: Any, dataset_split: str | None, name: str) -> tuple[list[tuple[dict, str]], str, list[str]]:
    if hasattr(ds, "keys") and not hasattr(ds, "features"):  # a DatasetDict
        splits = list(ds.keys())
        if dataset_split is None:
            if len(splits) != 1:
                raise ValueError(f"dataset_split must name one split of {name} (splits: {splits}), got None")
            dataset_split = splits[0]
        if dataset_split not in splits:
            raise ValueError(f"dataset_split must be one of {splits} (the splits of {name}), got {dataset_split!r}")
        ds = ds[dataset_split]
    elif dataset_split is not None:
        raise ValueError(f"dataset_split applies to a DatasetDict only, got dataset_split={dataset_split!r} with a single dataset")
    cols = list(ds.column_names)
    rows = [(dict(r), f"{name} row {i}") for i, r in enumerate(ds)]
    return rows, name, cols


def _render(tokenizer: Any, text: str, system: str | None) -> str:
    messages = ([{"role": "system", "content": system}] if system is not None else []) + [{"role": "user", "content": text}]
    rendered = tokenizer.apply_chat_template(messages, tokenize=False, add_generation_prompt=True)
    want = tokenizer.apply_chat_template(messages, tokenize=True, add_generation_prompt=True)
    want = list(want["input_ids"]) if hasattr(want, "keys") else list(want)  # some versions return a BatchEncoding
    if list(tokenizer(rendered)["input_ids"]) == want:
        return rendered
    bos = getattr(tokenizer, "bos_token", None)
    if bos and rendered.startswith(bos) and list(tokenizer(rendered[len(bos):])["input_ids"]) == want:
        return rendered[len(bos):]  # the tokenizer adds its start token itself
    got = list(tokenizer(rendered)["input_ids"])
    bos_id = getattr(tokenizer, "bos_token_id", None)
    if bos and bos_id is not None and got == [bos_id] + want:
        raise ValueError(f"chat_template: the tokenizer adds its start token {bos!r} to every text, but the chat template "
                         f"does not render it, so the prompt text tokenizes to one token more than the template's "
                         f"tokens; begin the template with {{{{ bos_token }}}}, or make the tokenizer not add it "
                         f"(add_bos_token = false in tokenizer_config.json)")
    at = next((i for i, (a, b) in enumerate(zip(got, want)) if a != b), min(len(got), len(want)))
    raise ValueError("chat_template: the rendered prompt does not tokenize back to apply_chat_template's tokens "
                     f"(rendered {rendered!r:.80}; they differ from token {at}: {got[at:at + 3]} against "
                     f"{want[at:at + 3]}); this tokenizer's template cannot be used as prompt text")


def _load_tokenizer(tokenizer: Any) -> Any:
    if isinstance(tokenizer, (str, os.PathLike)):
        path = Path(tokenizer)
        if not path.is_dir():
            raise ValueError(f"tokenizer must be a tokenizer or a local directory holding one, got {str(path)!r} (no such directory)")
        from transformers import AutoTokenizer

        return AutoTokenizer.from_pretrained(str(path), local_files_only=True)
    if tokenizer is None or not hasattr(tokenizer, "apply_chat_template"):
        raise TypeError(f"tokenizer must be a transformers tokenizer or a local directory, got {type(tokenizer).__name__}")
    return tokenizer


class UserTask(Task):
    """A user's prompt set as a task (``get_task("user", data=...)``); see the module docstring.

    ``split`` shuffles the distinct prompts with ``seed`` and takes the held-out
    prompts first, then the training prompts (disjoint). Rows repeating a prompt
    with the same fields are read once; the same prompt with different fields is
    an error (verifiers look rows up by prompt).
    """

    name = "user"
    description = "your own prompts: a JSONL/JSON/CSV/Parquet file or a local datasets dataset, with a field map"

    def __init__(self, *, data: Any = None, prompt_field: str = "prompt", answer_field: str | None = None,
                 reference_field: str | None = None, tests_field: str | None = None,
                 extra_fields: Sequence[str] | None = None, dataset_split: str | None = None,
                 chat_template: bool = False, system: str | None = None, tokenizer: Any = None) -> None:
        if data is None:
            raise ValueError("data must name a JSONL/JSON/CSV/Parquet file or a saved datasets directory "
                             "(recipe: [task_params] data = ...), or be a datasets.Dataset; got none")
        for key, value in (("prompt_field", prompt_field), ("answer_field", answer_field), ("reference_field", reference_field),
                           ("tests_field", tests_field), ("dataset_split", dataset_split), ("system", system)):
            if value is not None and not isinstance(value, str):
                raise TypeError(f"{key} must be a str, got {type(value).__name__} {value!r}")
        if not prompt_field:
            raise ValueError("prompt_field must name the column holding the prompts, got ''")
        if extra_fields is not None and (isinstance(extra_fields, str) or not all(isinstance(f, str) for f in extra_fields)):
            raise TypeError(f"extra_fields must be a list of column names, got {extra_fields!r}")
        if not isinstance(chat_template, bool):
            raise TypeError(f"chat_template must be true or false, got {type(chat_template).__name__} {chat_template!r}")
        if system is not None and not chat_template:
            raise ValueError("system is the system message of the chat template and cannot take effect without "
                             "chat_template = true; set chat_template = true or drop system")
        if tokenizer is not None and not chat_template:
            raise ValueError("tokenizer is used to apply the chat template and cannot take effect without "
                             "chat_template = true; set chat_template = true or drop tokenizer")
        super().__init__(data=data if not _is_dataset(data) else "<datasets.Dataset>", prompt_field=prompt_field,
                         answer_field=answer_field, reference_field=reference_field, tests_field=tests_field,
                         extra_fields=None if extra_fields is None else list(extra_fields), dataset_split=dataset_split,
                         chat_template=chat_template, system=system)
        tok = None
        if chat_template:
            if tokenizer is None:
                raise ValueError("chat_template = true needs the tokenizer whose template to apply: set tokenizer "
                                 "(a tokenizer or its local directory, e.g. the start_from model directory)")
            tok = _load_tokenizer(tokenizer)
            if not getattr(tok, "chat_template", None):
                raise ValueError(f"chat_template = true, but the tokenizer {getattr(tok, 'name_or_path', '') or type(tok).__name__!r} "
                                 "has no chat template (tokenizer.chat_template is None); set chat_template = false "
                                 "or give a tokenizer that has one")
        rows, where_data, cols = _load_rows(data, dataset_split)
        if not rows:
            raise ValueError(f"data {where_data} holds no rows; it must hold at least one prompt")
        named = {"prompt_field": prompt_field, "answer_field": answer_field, "reference_field": reference_field,
                 "tests_field": tests_field}
        for key, col in named.items():
            if col is not None and col not in cols:
                raise ValueError(f"{key} must name a column of {where_data} (columns: {sorted(cols)}), got {col!r}")
        for col in extra_fields or ():
            if col not in cols:
                raise ValueError(f"extra_fields must name columns of {where_data} (columns: {sorted(cols)}), got {col!r}")
        keep = set(cols) if extra_fields is None else {c for c in named.values() if c} | set(extra_fields)
        self.examples: list[Example] = []
        first: dict[str, tuple[dict, str]] = {}
        for row, where in rows:
            raw = row.get(prompt_field)
            if not isinstance(raw, str) or not raw:
                raise ValueError(f"{where}: field {prompt_field!r} (the prompt) must be a non-empty string, got "
                                 f"{type(raw).__name__} {raw!r:.60}")
            fields = {k: v for k, v in row.items() if k in keep}
            if raw in first:
                if first[raw][0] != fields:
                    raise ValueError(f"{where}: the prompt {raw[:60]!r} is also at {first[raw][1]} with other fields; "
                                     "verifiers look rows up by prompt, so each prompt needs one row")
                continue
            first[raw] = (fields, where)
            answer = None if answer_field is None else answer_text(row.get(answer_field), where, answer_field)
            reference = ""
            if reference_field is not None and row.get(reference_field) is not None:
                ref = row[reference_field]
                if not isinstance(ref, str):
                    raise ValueError(f"{where}: field {reference_field!r} (the reference response) must be a string, "
                                     f"got {type(ref).__name__} {ref!r:.60}")
                reference = ref
            text = _render(tok, raw, system) if tok is not None else raw
            self.examples.append(Example(prompt=text, answer=answer, reference=reference,
                                         meta={"fields": fields, "where": where}))

    def split(self, *, n_train: int, n_eval: int, seed: int = 0) -> tuple[list[Example], list[Example]]:
        n_train = check_int("n_train", n_train, min=0)
        n_eval = check_int("n_eval", n_eval, min=0)
        seed = check_int("seed", seed, min=0)
        if n_train + n_eval > len(self.examples):
            raise ValueError(f"n_train + n_eval must be <= {len(self.examples)} (distinct prompts in the data), "
                             f"got {n_train} + {n_eval}")
        order = list(range(len(self.examples)))
        random.Random(f"user/{seed}").shuffle(order)
        picked = [self.examples[i] for i in order]
        return picked[n_eval:n_eval + n_train], picked[:n_eval]

    def extract_answer(self, response: str) -> str | None:
        return normalize_text(response)

    def verifier(self, examples: Sequence[Example]) -> ExactVerifier:
        """The exact checker: reward 1 where the whitespace-normalised response equals the row's answer."""
        examples = _check_examples(examples)
        require_answers(examples, self.params["answer_field"],
                        lambda ex: (ex.meta or {}).get("where", f"prompt {ex.prompt!r:.60}"))
        return ExactVerifier(examples, normalize_text)

    @property
    def has_answers(self) -> bool:
        """True when every prompt has an answer (the exact checker can grade them all)."""
        return all(ex.answer is not None for ex in self.examples)

    def bind_verifier(self, verifier: Any, examples: Sequence[Example]) -> Callable:
        """``verifier`` bound to the rows of ``examples`` (see :func:`bonft.verifiers.fields.bind_rows`)."""
        examples = _check_examples(examples)
        rows = []
        for ex in examples:
            meta = ex.meta or {}
            if "fields" not in meta:
                raise ValueError(f"examples must come from this task's split (no row fields for prompt {ex.prompt!r:.60})")
            rows.append((ex.prompt, meta["fields"], meta["where"]))
        return bind_rows(verifier, rows)
