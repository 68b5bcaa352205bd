"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import detector as detector
from . import html as html
from . import overlay as overlay
from . import score as score
from . import study as study
from .detector import compare_report_html as compare_report_html
from .detector import detector_report_html as detector_report_html
from .html import (
    CAUTION as CAUTION,
)
from .html import (
    dumps as dumps,
)
from .html import (
    figure_to_svg as figure_to_svg,
)
from .html import (
    html_page as html_page,
)
from .html import (
    table_html as table_html,
)
from .html import (
    write_json as write_json,
)
from .overlay import draw_overlay as draw_overlay
from .score import write_score_outputs as write_score_outputs
from .study import write_outputs as write_outputs

__all__ = [
    "detector",
    "html",
    "overlay",
    "score",
    "study",
    "CAUTION",
    "html_page",
    "figure_to_svg",
    "table_html",
    "write_json",
    "dumps",
    "draw_overlay",
    "write_score_outputs",
    "detector_report_html",
    "compare_report_html",
    "write_outputs",
]
