"""The report as JSON and as Markdown; atomic text writes."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any, Final

from seqpipe.errors import SeqpipeError

PLOTS_HINT: Final = "no plots: matplotlib is not installed (in a seqpipe checkout: pip install '.[plots]')"
MODEL_NAMES: Final = {
    "uniform": "uniform",
    "unigram_add_k": "unigram add-k",
    "bigram_add_k": "bigram add-k",
    "trigram_add_k": "trigram add-k",
    "bigram_kneser_ney": "bigram Kneser-Ney",
    "trigram_kneser_ney": "trigram Kneser-Ney",
}


def to_json(report: dict[str, Any]) -> str:
    """Stable JSON text (sorted keys; NaN/inf refused: absent figures are null)."""
    return json.dumps(report, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False) + "\n"


def write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` via a temporary file and a rename."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        raise SeqpipeError(f"{path}: cannot write the report ({exc})") from exc
    finally:
        if tmp.exists():
            tmp.unlink()


def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def _pct(value: Any) -> str:
    return "n/a" if value is None else f"{100 * value:.2f}%"


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(_cell(c) for c in row) + " |" for row in rows]
    return [*out, ""]


def _splits(report: dict[str, Any]) -> list[str]:
    splits = report.get("splits", {})
    lines = ["## Splits", ""]
    header = [
        "split",
        "documents",
        "tokens",
        "content tokens",
        "distinct",
        "empty docs",
        "length min / median / p95 / max",
        "unknown rate",
        "Zipf alpha ± s.e. (s; x_min, types, KS distance)",
    ]
    rows = []
    skipped: dict[str, list[str]] = {}
    for name, s in splits.items():
        dl = s["document_length"]
        zipf = _zipf_cell(s["zipf"])
        if "skipped" in s["zipf"]:
            skipped.setdefault(s["zipf"]["skipped"], []).append(name)
        rows.append(
            [
                name,
                _num(s["documents"]),
                _num(s["tokens"]),
                _num(s["content_tokens"]),
                _num(s["distinct_tokens"]),
                _num(s["empty_documents"]),
                " / ".join(_num(dl[k]) for k in ("min", "median", "p95", "max")),
                _pct(s["unknown_rate"]),
                zipf,
            ]
        )
    lines += _table(header, rows)
    lines += [
        "Lengths count tokens including begin/end markers (documents table); the other token figures "
        "count content tokens (markers dropped). The 95th percentile interpolates linearly. Zipf: the "
        "discrete power law fitted by maximum likelihood to the counts of token types at or above x_min "
        "(Clauset, Shalizi & Newman 2009); alpha is the exponent of the count distribution, s = 1/(alpha-1) "
        "the rank-frequency exponent; KS distance: the fit's Kolmogorov-Smirnov distance to the tail.",
        "",
    ]
    lines += [f"Zipf for {', '.join(names)}: {reason}." for reason, names in skipped.items()]
    lines += [""] if skipped else []
    ks = sorted({k for s in splits.values() for k in s["coverage"]}, key=int)
    if ks:
        lines += ["### Coverage by the k most frequent train tokens", ""]
        rows = [[name] + [_pct(s["coverage"].get(k)) for k in ks] for name, s in splits.items()]
        lines += _table(["split"] + [f"k = {k}" for k in ks], rows)
    return lines


def _zipf_cell(z: dict[str, Any]) -> str:
    if "skipped" in z:
        return "not fitted"
    return (
        f"{z['alpha']:.3f} ± {z['standard_error']:.3f} ({z['rank_exponent']:.3f}; {_num(z['x_min'])}, "
        f"{_num(z['types'])}, {z['ks_distance']:.3f})"
    )


def _ngrams(report: dict[str, Any]) -> list[str]:
    top = report.get("top_ngrams")
    if not top:
        return []
    lines = ["## Most frequent n-grams of train", ""]
    for n, entries in top.items():
        lines += [f"### {n}-grams", ""]
        lines += _table(
            ["rank", "tokens", "count"],
            [[str(i + 1), " ".join(repr(t) for t in e["tokens"]), _num(e["count"])] for i, e in enumerate(entries)],
        )
    return lines


def _vocabulary_reuse(report: dict[str, Any]) -> list[str]:
    reuse = report.get("vocabulary_reuse")
    if not reuse:
        return []
    lines = [
        "## Reused vocabulary",
        "",
        f"The vocabulary was reused from the dataset `{reuse['dataset']}` (fingerprint `{reuse['fingerprint']}`): "
        "its ids mean what they mean there. Coverage: the share of the vocabulary's non-reserved entries that "
        "occur in the split's content tokens.",
        "",
    ]
    rows = [
        [name, _pct(s["unknown_rate"]), f"{_pct(s['coverage'])} ({_num(s['entries_seen'])} of {_num(s['entries'])})"]
        for name, s in reuse["splits"].items()
    ]
    return lines + _table(["split", "unknown rate", "vocabulary coverage"], rows)


def _leakage(report: dict[str, Any]) -> list[str]:
    leak = report.get("leakage")
    if not leak:
        return []
    n = report["settings"]["ngram_n"]
    lines = ["## Leakage from train", ""]
    rows = []
    for name, d in leak["documents"].items():
        g = leak["ngrams"][name]
        rows.append(
            [
                name,
                _num(d["checked"]),
                _num(d["duplicated"]),
                _pct(d["share"]),
                _num(d.get("text_duplicated")),
                _num(g["windows"]),
                _pct(g["share"]),
            ]
        )
    lines += _table(
        [
            "split",
            "documents checked",
            "same ids as a train doc",
            "share",
            "same text hash",
            f"{n}-gram windows",
            "windows seen in train",
        ],
        rows,
    )
    lines += [
        "Documents: XXH3-128 of each non-empty document's content ids. Windows: 64-bit multilinear "
        f"hash of every {n}-token window inside one document.",
        "",
    ]
    lines += _near_copies(leak.get("near_copies"))
    for name, d in leak["documents"].items():
        if d["examples"]:
            lines += [f"Examples from {name}:", ""]
            lines += [
                f"- document {e['document']} = train document {e['train_document']} "
                f"({e['tokens']} tokens): {e['text']!r}"
                for e in d["examples"]
            ]
            lines.append("")
    return lines


def _near_copies(near: dict[str, Any] | None) -> list[str]:
    if not near:
        return []
    p = near["parameters"]
    rows = [[name, _num(e["checked"]), _num(e["near_copies"]), _pct(e["share"])] for name, e in near["splits"].items()]
    lines = _table(["split", "documents checked", "with a near-copy in train", "share"], rows)
    lines += [
        f"Near-copies: MinHash over {p['shingle']}-word shingles of each document's decoded text, {p['bands']} bands "
        f"of {p['rows']} rows, estimated Jaccard similarity at least {p['threshold']} (seed {p['seed']}; parameters "
        f"from the {'recipe' + chr(39) + 's near_dedupe step' if p['from'] == 'recipe' else 'near_dedupe defaults'}), "
        "whether or not the build removed near-duplicates.",
        "",
    ]
    for name, e in near["splits"].items():
        if e["examples"]:
            lines += [f"Near-copies in {name}:", ""]
            lines += [
                f"- document {x['document']} ~ train document {x['train_document']} (similarity {x['similarity']:.3f})"
                for x in e["examples"]
            ]
            lines.append("")
    return lines


def _perplexity(report: dict[str, Any]) -> list[str]:
    ppl = report.get("perplexity")
    if not ppl:
        return []
    s = report["settings"]
    lines = [
        "## Baseline perplexities",
        "",
        ppl["predicted"],
        "",
        f"add-k uses k = {s['add_k']}; Kneser-Ney uses discount {s['kn_discount']}.",
        "",
    ]
    names = list(ppl["splits"])
    sp = ppl["splits"]
    header = ["model"] + [f"{n} {col}" for n in names for col in ("perplexity", "bits/byte", "bits/char")]
    rows = [
        [MODEL_NAMES[m]]
        + [
            cell
            for n in names
            for cell in (
                _num(sp[n][m], 6),
                _num(sp[n].get("bits_per_byte", {}).get(m), 4),
                _num(sp[n].get("bits_per_character", {}).get(m), 4),
            )
        ]
        for m in MODEL_NAMES
    ]
    lines += _table(header, rows)
    lines += [
        "Counted: "
        + "; ".join(
            f"{n}: {_num(sp[n]['events'])} events, {_num(sp[n].get('text_bytes'))} bytes, "
            f"{_num(sp[n].get('characters'))} characters"
            for n in names
        )
        + ".",
        "",
    ]
    if ppl.get("per_text"):
        lines += [ppl["per_text"], ""]
    return lines


def to_markdown(report: dict[str, Any], *, plots_drawn: bool) -> str:
    """The human-readable report."""
    ds = report["dataset"]
    lines = [
        f"# Corpus report: {ds.get('name', ds['fingerprint'][:12])}",
        "",
        f"Dataset fingerprint `{ds['fingerprint']}`, vocabulary of {ds['vocabulary_entries']:,} ids "
        f"(reserved: {', '.join(ds['reserved'])}).",
        "",
    ]
    lines += _splits(report) + _vocabulary_reuse(report)
    lines += ["## Rank-frequency", ""]
    lines += ["![rank-frequency](rank_frequency.png)", ""] if plots_drawn else [PLOTS_HINT, ""]
    lines += _ngrams(report) + _leakage(report) + _perplexity(report)
    if report.get("notes"):
        lines += ["## Notes", ""] + [f"- {note}" for note in report["notes"]] + [""]
    return "\n".join(lines)
