"""Private helpers of the report stage: graph drawing, the HTML report and the file exports.

The public entry point is `pipeline.stages.report.run`; from here only the review reader is public,
for the lead's ``knowledge.review_file``.
"""

from __future__ import annotations

from ._exports import read_review_file

__all__ = ["read_review_file"]
