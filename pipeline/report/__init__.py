"""Private helpers of the report stage: graph drawing, the HTML report and the file exports.

The public entry point is `pipeline.stages.report.run`; from here only the review
loop's reader is public (``knowledge.review_file``).
"""

from __future__ import annotations

from ._review import VERDICTS, read_review_file, review_knowledge

__all__ = ["VERDICTS", "read_review_file", "review_knowledge"]
