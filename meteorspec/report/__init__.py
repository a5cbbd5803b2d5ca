"""Night report: figures (:mod:`.figures`) and static HTML pages (:mod:`.html`)."""

from .html import write_report

__all__ = ["write_report"]
