"""Reports of a scan: heatmaps, per-head bars, compensation map, CSV tables, index.html,
and the one-pair drill-down. See docs/report.md."""

from .build import load_report_inputs, write_report
from ...interpret.pair import PairDetail, pair_detail
from ...extract.vocabulary import Vocabulary, load_vocabulary

__all__ = ["PairDetail", "Vocabulary", "load_report_inputs", "load_vocabulary", "pair_detail", "write_report"]
