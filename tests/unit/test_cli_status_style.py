"""`shardsieve status`: saturated and stale nodes stand out (docs/cli.md, "Commands").

The rows are built from admin_pb2.NodeStatus messages (the wire contract), and the rendered
table is checked through rich's own recorder (Console(record=True).export_text),
so the test reads what an operator would see (text and ANSI colour codes).
"""

from __future__ import annotations

from rich.console import Console
from rich.table import Table

from shardsieve.cli.ops import row_style, state_text
from shardsieve.v1 import admin_pb2


def _node(node_id: str, **kw: object) -> admin_pb2.NodeStatus:
    return admin_pb2.NodeStatus(node_id=node_id, connected=kw.pop("connected", True), state=kw.pop("state", "fresh"),
                                **kw)


def test_saturated_and_stale_rows_are_marked_in_words_and_colour() -> None:
    nodes = [_node("shed-01"), _node("shed-02", saturated=True), _node("shed-03", state="stale", stale=True),
             _node("shed-04", connected=False, state="disconnected", stale=True)]
    table = Table()
    table.add_column("node")
    table.add_column("state")
    for n in nodes:
        table.add_row(n.node_id, state_text(n), style=row_style(n))
    out = Console(record=True, width=80, color_system="truecolor", force_terminal=True)
    out.print(table)
    text = out.export_text(clear=False)
    ansi = {line.split("shed-0")[1][0]: line for line in out.export_text(styles=True).splitlines() if "shed-0" in line}
    assert "fresh SATURATED" in text and "stale" in text and "disconnected" in text
    rows = {n.node_id: row_style(n) for n in nodes}
    assert rows["shed-01"] is None                                # a healthy row is plain
    assert rows["shed-02"] and "red" in rows["shed-02"]
    assert rows["shed-03"] == rows["shed-04"] == "yellow"
    # SGR codes in the output (ECMA-48: 31 red foreground, 33 yellow): the operator sees the colour
    assert "\x1b[" not in ansi["1"] or "31" not in ansi["1"]
    assert "\x1b[1;31m" in ansi["2"] and "\x1b[33m" in ansi["3"] and "\x1b[33m" in ansi["4"]
