"""Minimal workbook writers for the tests: an ``.xlsx`` (Office Open XML, ECMA-376 Part 1,
SpreadsheetML with inline strings) and an ``.ods`` (OpenDocument 1.2, ``table:table``)
with a few sheets of numbers and text. Written by hand so that the tests need no
spreadsheet library; only what the readers under test look at is there."""

from __future__ import annotations

import zipfile
from xml.sax.saxutils import escape


def _col(j: int) -> str:
    s = ""
    j += 1
    while j:
        j, r = divmod(j - 1, 26)
        s = chr(65 + r) + s
    return s


def write_xlsx(path, sheets: dict[str, list[list]]) -> None:
    """``sheets``: name → rows (lists of float, int, str or None), from A1 on."""
    names = list(sheets)
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        z.writestr("[Content_Types].xml",
                   '<?xml version="1.0" encoding="UTF-8"?><Types xmlns="http://schemas.'
                   'openxmlformats.org/package/2006/content-types"><Default Extension="rels" '
                   'ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
                   '<Default Extension="xml" ContentType="application/xml"/><Override '
                   'PartName="/xl/workbook.xml" ContentType="application/vnd.openxmlformats-'
                   'officedocument.spreadsheetml.sheet.main+xml"/>'
                   + "".join(f'<Override PartName="/xl/worksheets/sheet{k + 1}.xml" '
                             'ContentType="application/vnd.openxmlformats-officedocument.'
                             'spreadsheetml.worksheet+xml"/>' for k in range(len(names)))
                   + "</Types>")
        z.writestr("_rels/.rels",
                   '<?xml version="1.0" encoding="UTF-8"?><Relationships xmlns="http://'
                   'schemas.openxmlformats.org/package/2006/relationships"><Relationship '
                   'Id="rId1" Type="http://schemas.openxmlformats.org/officeDocument/2006/'
                   'relationships/officeDocument" Target="xl/workbook.xml"/></Relationships>')
        z.writestr("xl/workbook.xml",
                   '<?xml version="1.0" encoding="UTF-8"?><workbook xmlns="http://schemas.'
                   'openxmlformats.org/spreadsheetml/2006/main" xmlns:r="http://schemas.'
                   'openxmlformats.org/officeDocument/2006/relationships"><sheets>'
                   + "".join(f'<sheet name="{escape(n)}" sheetId="{k + 1}" r:id="rId{k + 1}"/>'
                             for k, n in enumerate(names)) + "</sheets></workbook>")
        z.writestr("xl/_rels/workbook.xml.rels",
                   '<?xml version="1.0" encoding="UTF-8"?><Relationships xmlns="http://'
                   'schemas.openxmlformats.org/package/2006/relationships">'
                   + "".join(f'<Relationship Id="rId{k + 1}" Type="http://schemas.'
                             'openxmlformats.org/officeDocument/2006/relationships/worksheet" '
                             f'Target="worksheets/sheet{k + 1}.xml"/>' for k in range(len(names)))
                   + "</Relationships>")
        for k, name in enumerate(names):
            rows = []
            for i, row in enumerate(sheets[name]):
                cells = []
                for j, v in enumerate(row):
                    ref = f"{_col(j)}{i + 1}"
                    if v is None:
                        continue
                    if isinstance(v, (int, float)):
                        cells.append(f'<c r="{ref}"><v>{v!r}</v></c>')
                    else:
                        cells.append(f'<c r="{ref}" t="inlineStr"><is><t>{escape(str(v))}'
                                     "</t></is></c>")
                rows.append(f'<row r="{i + 1}">{"".join(cells)}</row>')
            z.writestr(f"xl/worksheets/sheet{k + 1}.xml",
                       '<?xml version="1.0" encoding="UTF-8"?><worksheet xmlns="http://'
                       'schemas.openxmlformats.org/spreadsheetml/2006/main"><sheetData>'
                       + "".join(rows) + "</sheetData></worksheet>")


def write_ods(path, sheets: dict[str, list[list]]) -> None:
    """The same as :func:`write_xlsx`, as an OpenDocument spreadsheet; ``datetime`` cells
    are written as date cells."""
    body = []
    for name, rows in sheets.items():
        body.append(f'<table:table table:name="{escape(name)}">')
        for row in rows:
            cells = []
            for v in row:
                if v is None:
                    cells.append("<table:table-cell/>")
                elif hasattr(v, "isoformat"):  # a date-time cell
                    cells.append(f'<table:table-cell office:value-type="date" '
                                 f'office:date-value="{v.isoformat()}"><text:p>{v}</text:p>'
                                 "</table:table-cell>")
                elif isinstance(v, (int, float)):
                    cells.append(f'<table:table-cell office:value-type="float" '
                                 f'office:value="{v!r}"><text:p>{v!r}</text:p>'
                                 "</table:table-cell>")
                else:
                    cells.append('<table:table-cell office:value-type="string"><text:p>'
                                 f"{escape(str(v))}</text:p></table:table-cell>")
            body.append(f"<table:table-row>{''.join(cells)}</table:table-row>")
        body.append("</table:table>")
    ns = ('xmlns:office="urn:oasis:names:tc:opendocument:xmlns:office:1.0" '
          'xmlns:table="urn:oasis:names:tc:opendocument:xmlns:table:1.0" '
          'xmlns:text="urn:oasis:names:tc:opendocument:xmlns:text:1.0"')
    with zipfile.ZipFile(path, "w") as z:
        z.writestr(zipfile.ZipInfo("mimetype"), "application/vnd.oasis.opendocument.spreadsheet")
        z.writestr("META-INF/manifest.xml",
                   '<?xml version="1.0" encoding="UTF-8"?><manifest:manifest xmlns:manifest='
                   '"urn:oasis:names:tc:opendocument:xmlns:manifest:1.0" manifest:version="1.2">'
                   '<manifest:file-entry manifest:full-path="/" manifest:media-type="application/'
                   'vnd.oasis.opendocument.spreadsheet"/><manifest:file-entry manifest:full-path='
                   '"content.xml" manifest:media-type="text/xml"/></manifest:manifest>')
        z.writestr("content.xml",
                   f'<?xml version="1.0" encoding="UTF-8"?><office:document-content {ns} '
                   'office:version="1.2"><office:body><office:spreadsheet>'
                   + "".join(body) + "</office:spreadsheet></office:body>"
                   "</office:document-content>")
