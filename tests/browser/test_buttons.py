"""A disabled button must look it: the stylesheet as Chromium applies it."""

from __future__ import annotations


def test_disabled_button_looks_disabled(page):
    page.goto(page.base + "/login")
    styles = page.evaluate("""() => {
        const make = (disabled) => {
            const b = document.createElement('button');
            b.textContent = 'Search for setpoints';
            b.disabled = disabled;
            document.body.appendChild(b);
            const s = getComputedStyle(b);
            return {background: s.backgroundColor, cursor: s.cursor, border: s.borderStyle};
        };
        return {enabled: make(false), disabled: make(true)};
    }""")
    assert styles["disabled"]["cursor"] == "not-allowed"
    assert styles["disabled"]["background"] != styles["enabled"]["background"]
    assert styles["disabled"]["border"] == "dashed"
    assert styles["enabled"]["cursor"] == "pointer"
