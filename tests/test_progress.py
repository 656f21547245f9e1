"""Progress lines in logs: one line per 10 % step crossed, none repeated."""
import io

from pipeline.progress import Progress


def test_plain_lines_every_ten_percent():
    buf = io.StringIO()
    p = Progress(100, "fit", stream=buf)
    for _ in range(100):
        p(1)
    lines = buf.getvalue().splitlines()
    assert lines[0] == "fit: 10% (10/100)" and lines[-1] == "fit: 100% (100/100)"
    assert len(lines) == 10


def test_few_items_no_repeated_lines():
    buf = io.StringIO()
    p = Progress(5, "simulate", stream=buf)
    for _ in range(5):
        p(1)
    lines = buf.getvalue().splitlines()
    assert lines == [f"simulate: {20 * k}% ({k}/5)" for k in range(1, 6)]
