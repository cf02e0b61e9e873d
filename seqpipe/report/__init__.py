"""Corpus report: split statistics, Zipf fit, top n-grams, leakage and baseline perplexities.

``corpus_report(dataset)`` returns every figure as a JSON-serializable dict;
``write_report(dataset_dir, out_dir)`` also writes ``report.md``, ``report.json`` and
``rank_frequency.png`` (matplotlib optional: the ``plots`` extra).
"""

from seqpipe.report.core import corpus_report, write_dataset_report, write_report

__all__ = ["corpus_report", "write_dataset_report", "write_report"]
