"""The front end's own look: one style sheet, injected once by the app (no icon fonts, no network).

Verdicts differ by symbol, word and border style (solid, dashed, double, dotted); colour only adds to that.
"""

from __future__ import annotations

CSS = """
.lk-app { font-size: 14px; color: #1c2430; }
.lk-app .widget-html-content { line-height: 1.4; }
.lk-app .lk-strip { background: #eef1f5; border-left: 6px solid #3d4f66; padding: 6px 10px; margin: 4px 0; }
.lk-app .lk-strip b { color: #22303f; }
.lk-app .lk-state { font-weight: bold; padding: 1px 6px; border: 1px solid #3d4f66; border-radius: 3px; }
.lk-app .lk-verdict { display: inline-block; padding: 1px 8px; border-radius: 3px; font-size: 14px;
  white-space: nowrap; }
.lk-app .widget-button { width: auto; min-width: 120px; }
.lk-app .lk-v-accept { border: 2px solid #0b6e4f; color: #0b6e4f; }
.lk-app .lk-v-marginal { border: 2px dashed #7a5200; color: #7a5200; }
.lk-app .lk-v-outside { border: 4px double #a4161a; color: #a4161a; }
.lk-app .lk-v-unchecked { border: 2px dotted #5c6370; color: #5c6370; }
.lk-app .lk-pending { color: #5c6370; font-style: italic; font-size: 12px; }
.lk-app .lk-echo { font-family: monospace; font-size: 12.5px; color: #2b3440; }
.lk-app .lk-diag { border-left: 3px solid #7a5200; padding-left: 6px; font-size: 13px; }
.lk-app .lk-caution { border: 1px solid #a4161a; border-left-width: 6px; padding: 4px 8px; margin: 3px 0;
  background: #fff7f5; }
.lk-app .lk-caution::before { content: "CAUTION  "; font-weight: bold; color: #a4161a; }
.lk-app .lk-defer { font-size: 12px; color: #4a5260; }
.lk-app .lk-msg { padding: 3px 8px; margin: 3px 0; border: 1px solid #8a94a3; }
.lk-app .lk-msg-problem { border: 2px solid #a4161a; background: #fff7f5; }
.lk-app .lk-msg-ok { border: 1px solid #0b6e4f; }
.lk-app .lk-table { border-collapse: collapse; font-size: 13px; }
.lk-app .lk-table th { text-align: left; border-bottom: 2px solid #3d4f66; padding: 2px 8px; }
.lk-app .lk-table td { border-bottom: 1px solid #d5dae1; padding: 2px 8px; vertical-align: top; }
.lk-app .lk-steps div { padding: 1px 4px; font-size: 13px; }
.lk-app .lk-steps .lk-here { font-weight: bold; border: 2px solid #3d4f66; }
.lk-app .lk-head { font-weight: bold; border-bottom: 2px solid #3d4f66; }
.lk-app .lk-muted { color: #5c6370; font-size: 12px; }
.lk-app .lk-big { font-size: 16px; font-weight: bold; }
.lk-app .lk-entry input { font-size: 15px; font-family: monospace; }
.lk-app .lk-diagram svg { max-width: 100%; height: auto; }
"""


def style_html() -> str:
    """The ``<style>`` element (constant text: nothing from users or files)."""
    return f"<style>{CSS}</style>"
