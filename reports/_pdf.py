"""Render the pack's document as a paged PDF with reportlab.

Every page carries the study's name and the run's date in its head and "Page X of Y" in its
foot; the second page is a table of contents (two build passes). Text is set in DejaVu
(shipped with matplotlib) so any Unicode in names prints, and the text stays extractable.
"""
from __future__ import annotations

import io
from pathlib import Path

import matplotlib
from reportlab.lib import colors
from reportlab.lib.enums import TA_LEFT
from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import ParagraphStyle
from reportlab.lib.units import mm
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFont
from reportlab.lib.utils import ImageReader
from reportlab.lib.units import cm
from reportlab.platypus import (BaseDocTemplate, CondPageBreak, Flowable, Frame, KeepTogether, PageBreak,
                                PageTemplate, Paragraph, Preformatted, Spacer, Table as RLTable,
                                TableStyle)
from reportlab.platypus.tableofcontents import TableOfContents
from xml.sax.saxutils import escape

from . import _style as S
from ._model import Figure, Para, Table

__all__ = ["render_pdf"]

_FONTS = {"np-sans": "DejaVuSans.ttf", "np-sans-bold": "DejaVuSans-Bold.ttf",
          "np-sans-italic": "DejaVuSans-Oblique.ttf", "np-serif-bold": "DejaVuSerif-Bold.ttf",
          "np-mono": "DejaVuSansMono.ttf"}


def _register_fonts() -> None:
    have = set(pdfmetrics.getRegisteredFontNames())
    base = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    for name, file in _FONTS.items():
        if name not in have:
            pdfmetrics.registerFont(TTFont(name, str(base / file)))
    pdfmetrics.registerFontFamily("np-sans", normal="np-sans", bold="np-sans-bold",
                                  italic="np-sans-italic", boldItalic="np-sans-bold")


def _c(hex_colour: str):
    return colors.HexColor(hex_colour)


def _styles() -> dict:
    ink, muted, accent = _c(S.INK), _c(S.MUTED), _c(S.ACCENT)
    base = ParagraphStyle("body", fontName="np-sans", fontSize=9.5, leading=13.2, textColor=ink,
                          spaceAfter=5, alignment=TA_LEFT)
    st = {
        "body": base,
        "title": ParagraphStyle("title", parent=base, fontName="np-serif-bold", fontSize=22, leading=27,
                                spaceAfter=6),
        "kicker": ParagraphStyle("kicker", parent=base, fontName="np-sans-bold", fontSize=8.5,
                                 textColor=accent, spaceAfter=2),
        "meta": ParagraphStyle("meta", parent=base, fontSize=8.5, textColor=muted),
        "h1": ParagraphStyle("h1", parent=base, fontName="np-serif-bold", fontSize=16, leading=20,
                             textColor=ink, spaceBefore=0, spaceAfter=8),
        "lead": ParagraphStyle("lead", parent=base, fontName="np-sans-bold", fontSize=10.5, leading=14),
        "answer": ParagraphStyle("answer", parent=base, fontSize=10.5, leading=14.5, borderPadding=(7, 8, 7, 10),
                                 backColor=colors.white, borderWidth=0, leftIndent=10, rightIndent=8,
                                 spaceBefore=6, spaceAfter=12),
        "hypothetical": ParagraphStyle("hyp", parent=base, fontName="np-sans-italic", fontSize=8.2,
                                       leading=11, textColor=muted),
        "absent": ParagraphStyle("absent", parent=base, borderWidth=0.6, borderColor=_c(S.OPEN),
                                 borderPadding=6, borderDash=(2, 2), spaceBefore=6, spaceAfter=10,
                                 leftIndent=6, rightIndent=6),
        "note": ParagraphStyle("note", parent=base, fontSize=8, leading=10.5, textColor=muted),
        "caution": ParagraphStyle("caution", parent=base, fontName="np-sans-bold", borderWidth=0.8,
                                  borderColor=ink, borderPadding=6, leftIndent=6, rightIndent=6,
                                  spaceBefore=6, spaceAfter=10),
        "caption": ParagraphStyle("caption", parent=base, fontSize=8.2, leading=10.5, textColor=muted,
                                  spaceBefore=3, spaceAfter=10),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.8, leading=9.6, spaceAfter=0),
        "cellnum": ParagraphStyle("cellnum", parent=base, fontSize=7.8, leading=9.6, spaceAfter=0,
                                  alignment=2),
        "head": ParagraphStyle("head", parent=base, fontName="np-sans-bold", fontSize=7.6, leading=9.4,
                               spaceAfter=0),
        "headnum": ParagraphStyle("headnum", parent=base, fontName="np-sans-bold", fontSize=7.6,
                                  leading=9.4, spaceAfter=0, alignment=2),
        "code": ParagraphStyle("code", parent=base, fontName="np-mono", fontSize=7.6, leading=9.4),
        "toc1": ParagraphStyle("toc1", parent=base, fontSize=10.5, leading=17, leftIndent=4),
    }
    return st


def _decorate(canv, doc) -> None:
    """Head (study name, run date) and foot (caution, "Page X of Y") of every page."""
    title, date = doc.pack_info
    total = doc._known_total
    w, h = A4
    canv.saveState()
    canv.setStrokeColor(_c(S.ACCENT))
    canv.setLineWidth(0.8)
    canv.line(16 * mm, h - 13 * mm, w - 16 * mm, h - 13 * mm)
    canv.setFont("np-sans-bold", 7.8)
    canv.setFillColor(_c(S.INK))
    canv.drawString(16 * mm, h - 11.2 * mm, _clip(title, 80))
    canv.setFont("np-sans", 7.8)
    canv.setFillColor(_c(S.MUTED))
    canv.drawRightString(w - 16 * mm, h - 11.2 * mm, f"Run of {date}" if date else "")
    canv.line(16 * mm, 13 * mm, w - 16 * mm, 13 * mm)
    canv.drawString(16 * mm, 9 * mm, "Hypothetical simulated and backtested results. "
                                     "Decision support, not investment advice.")
    canv.setFillColor(_c(S.INK))
    canv.drawRightString(w - 16 * mm, 9 * mm, f"Page {doc.page} of {total if total else '?'}")
    canv.restoreState()


def _clip(text: str, n: int) -> str:
    return text if len(text) <= n else text[: n - 1] + "…"


class _Doc(BaseDocTemplate):
    def __init__(self, target, **kw):
        super().__init__(target, pagesize=A4, leftMargin=16 * mm, rightMargin=16 * mm,
                         topMargin=18 * mm, bottomMargin=18 * mm, **kw)
        frame = Frame(self.leftMargin, self.bottomMargin, self.width, self.height, id="body",
                      leftPadding=0, rightPadding=0, topPadding=0, bottomPadding=0)
        self.addPageTemplates([PageTemplate(id="page", frames=[frame], onPage=_decorate)])

    _pass = 0
    _known_total = None    # page count of the previous pass, printed as "of Y"
    _used_total = None
    pack_info = ("", "")

    def handle_documentBegin(self):
        self._pass += 1
        super().handle_documentBegin()

    def _endBuild(self):
        super()._endBuild()
        self._used_total = self._known_total
        self._known_total = self.page

    def _allSatisfied(self):
        # one more pass until the contents and the "of Y" page count are both settled
        return super()._allSatisfied() and self._used_total == self._known_total

    def afterFlowable(self, flowable):
        if isinstance(flowable, Paragraph) and getattr(flowable, "_toc_key", None):
            text = flowable.getPlainText()
            key = flowable._toc_key
            self.canv.bookmarkPage(key)
            self.canv.addOutlineEntry(text, key, level=0, closed=False)
            self.notify("TOCEntry", (0, text, self.page, key))


class _LazyImage(Flowable):
    """A PNG drawn only on the final layout pass (the table-of-contents pass only needs its
    size), decoded once and reused."""

    def __init__(self, data: bytes, width: float, height: float):
        super().__init__()
        self._data = data
        self._reader = None
        self.width, self.height = width, height

    def wrap(self, avail_w, avail_h):
        return self.width, self.height

    def draw(self):
        doc = getattr(self.canv, "_doctemplate", None)
        if doc is not None and getattr(doc, "_pass", 2) < 2:
            return
        if self._reader is None:
            self._reader = ImageReader(io.BytesIO(self._data))
        self.canv.drawImage(self._reader, 0, 0, width=self.width, height=self.height)


def _p(text: str, style) -> Paragraph:
    return Paragraph(escape(text), style)


def _table_flowables(t: Table, number: int, st: dict, width: float) -> list:
    is_kv = t.columns == ("Item", "Value")
    ncols = len(t.columns)
    # wide tables are split into column chunks that repeat the label column
    chunks = t.column_chunks(10)
    numeric_all = [False] * ncols if is_kv else t.numeric_columns()
    out = []
    for part, cols in enumerate(chunks):
        numeric = [numeric_all[i] for i in cols]
        head = [Paragraph(escape(str(t.columns[i])), st["headnum"] if numeric[j] else st["head"])
                for j, i in enumerate(cols)]
        data = [] if is_kv else [head]
        styles = [("VALIGN", (0, 0), (-1, -1), "TOP"),
                  ("LEFTPADDING", (0, 0), (-1, -1), 3.5), ("RIGHTPADDING", (0, 0), (-1, -1), 3.5),
                  ("TOPPADDING", (0, 0), (-1, -1), 2.2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2.4),
                  ("LINEBELOW", (0, 0), (-1, -1), 0.35, colors.HexColor("#d9dde2"))]
        if not is_kv:
            styles.append(("LINEBELOW", (0, 0), (-1, 0), 1.0, _c(S.INK)))
        for r_index, row in enumerate(t.rows):
            line = []
            for j, i in enumerate(cols):
                c = row[i]
                text = escape(c.text)
                if c.status:
                    colour = {"pass": S.PASS, "fail": S.FAIL, "na": S.OPEN}[c.status]
                    text = f'<font name="np-sans-bold" color="{colour}">{text}</font>'
                style = st["cellnum"] if numeric[j] else st["cell"]
                if is_kv and j == 0:
                    style = ParagraphStyle("kvlab", parent=st["cell"], textColor=_c(S.MUTED))
                if len(c.text) > 40 and " " not in c.text:
                    style = ParagraphStyle("mono", parent=style, fontName="np-mono", fontSize=7,
                                           wordWrap="CJK")
                line.append(Paragraph(text, style))
            data.append(line)
        widths = _col_widths(t, cols, width, is_kv)
        table = RLTable(data, colWidths=widths, repeatRows=0 if is_kv else 1, hAlign="LEFT")
        table.setStyle(TableStyle(styles))
        cap = f"Table {number}{'' if len(chunks) == 1 else ' (part %d of %d)' % (part + 1, len(chunks))}. "
        caption = Paragraph(f'<font name="np-sans-bold" color="{S.INK}">{escape(cap)}</font>'
                            f"{escape(t.caption)}", st["caption"])
        caption.keepWithNext = True
        out.append(caption)
        out.append(table)
    if t.note:
        out.append(Spacer(1, 3))
        out.append(_p(t.note, st["note"]))
    out.append(Spacer(1, 8))
    return out


def _col_widths(t: Table, cols, width: float, is_kv: bool):
    """Column widths from the text's measured width: numbers never wrap, text wraps last."""
    if is_kv:
        return [0.32 * width, 0.68 * width]
    pad = 8.0
    sw = pdfmetrics.stringWidth
    mins, wants, is_text = [], [], []
    for i in cols:
        head = str(t.columns[i])
        head_word = max(sw(w, "np-sans-bold", 7.6) for w in head.split()) + pad
        head_full = sw(head, "np-sans-bold", 7.6) + pad
        texts = [r[i].text for r in t.rows] or [""]
        numeric = any(r[i].numeric for r in t.rows)
        full = max(sw(x, "np-sans", 7.8) for x in texts) + pad
        word = max((sw(w, "np-sans", 7.8) for x in texts for w in x.split()), default=0) + pad
        lo = max(head_word, full if numeric else min(full, max(word, 60.0)))
        mins.append(lo)
        wants.append(max(lo, full, min(head_full, 1.6 * lo)))
        is_text.append(not numeric)
    if sum(wants) <= width:
        extra = width - sum(wants)
        tot = sum(wants)
        return [w + extra * w / tot for w in wants]
    if sum(mins) <= width:
        room = width - sum(mins)
        need = [w - m for w, m in zip(wants, mins)]
        tot = sum(need) or 1.0
        return [m + room * n / tot for m, n in zip(mins, need)]
    scale = width / sum(mins)
    return [m * scale for m in mins]


def _figure_flowables(f: Figure, number: int, st: dict, width: float, max_height: float) -> list:
    w = min(width, f.width_in * 72)
    h = w * f.height_in / f.width_in
    if h > max_height:
        h = max_height
        w = h * f.width_in / f.height_in
    img = _LazyImage(f.png, w, h)
    cap = Paragraph(f'<font name="np-sans-bold" color="{S.INK}">Figure {number}.</font> '
                    f"{escape(f.caption)} (numbers: data/{escape(f.key)}.csv)", st["caption"])
    return [KeepTogether([img, cap])]


def render_pdf(path: Path, title: str, created: str, sections, *, generated: str) -> None:
    """Write the pack as a PDF at ``path``."""
    _register_fonts()
    st = _styles()
    doc = _Doc(str(path), title=f"{title}: evidence pack", author="noiseproof",
               subject="Evidence pack (hypothetical results; decision support, not investment advice)")
    width = doc.width
    max_fig_h = doc.height - 60
    story = [
        _p("NOISEPROOF EVIDENCE PACK", st["kicker"]),
        _p(title, st["title"]),
        _p(f"Run created {created or 'n/a'} · pack built {generated}", st["meta"]),
        _p("Hypothetical simulated and backtested results · decision support, not investment advice",
           st["meta"]),
        Spacer(1, 14),
        _p("Contents", st["h1"]),
    ]
    toc = TableOfContents()
    toc.levelStyles = [st["toc1"]]
    toc.dotsMinLevel = 0
    story.append(toc)
    fig_no = tab_no = 0
    for s in sections:
        # a section with results starts a page; one that only says why it is empty does not
        story.append(CondPageBreak(6 * cm) if s.absent else PageBreak())
        if s.absent:
            story.append(Spacer(1, 14))
        head = Paragraph(f'<font color="{S.ACCENT}">{s.number}</font>  {escape(s.title)}', st["h1"])
        head._toc_key = f"s{s.number}"
        story.append(head)
        for b in s.blocks:
            if isinstance(b, Para):
                if b.style == "code":
                    story.append(Preformatted(b.text, st["code"]))
                elif b.style.startswith("answer"):
                    colour = {"answer-pass": S.PASS, "answer-fail": S.FAIL}.get(b.style, S.OPEN)
                    ans = ParagraphStyle("ans", parent=st["answer"], borderColor=_c(colour),
                                         borderWidth=1.4)
                    story.append(_p(b.text, ans))
                else:
                    story.append(_p(b.text, st.get(b.style, st["body"])))
            elif isinstance(b, Table):
                tab_no += 1
                story.extend(_table_flowables(b, tab_no, st, width))
            elif isinstance(b, Figure):
                fig_no += 1
                story.extend(_figure_flowables(b, fig_no, st, width, max_fig_h))
    doc.pack_info = (title, (created or "")[:10])
    doc.multiBuild(story)
