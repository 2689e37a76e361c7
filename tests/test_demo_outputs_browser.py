"""Every HTML output of the reduced demo, opened in headless Chromium with networking off."""

from __future__ import annotations

import pytest
from browser_support import launch_browser, open_local_html, require_browser, save_screenshot

pytestmark = pytest.mark.browser

EXPECTED_LAYERS = {
    "map.html": {
        "Justified minimum AKI zones",
        "Roads",
        "Descent corridors (risk)",
        "Stations",
        "Inspection routes",
        "Inspector bases",
    },
    "map_distributor.html": {"Supply areas (fleet zones)", "Roads", "Stations"},
    "map_public.html": {"Regular most vehicles need here", "Roads", "Towns", "Fuel stations"},
}
STATION_LAYER = {
    "map.html": "Stations",
    "map_distributor.html": "Stations",
    "map_public.html": "Fuel stations",
}


@pytest.fixture(scope="module")
def browser():
    require_browser()
    with launch_browser() as b:
        yield b


@pytest.mark.parametrize("name", sorted(EXPECTED_LAYERS))
def test_map_opens_clean_with_layers_popup_and_cautions(browser, small_demo_run, name, tmp_path):
    out, _ = small_demo_run
    with open_local_html(browser, out / name) as (page, rec):
        labels = {
            t.strip()
            for t in page.locator(".leaflet-control-layers-overlays label").all_inner_texts()
        }
        assert EXPECTED_LAYERS[name] <= labels, labels
        assert "vehicle maker's fuel recommendation" in page.locator("#ag-cautions").inner_text()
        # open a station popup through the search box (first station of the table)
        page.fill("#ag-search-input", "ST-00")
        page.locator("#ag-search-results button").first.click()
        popup = page.locator(".leaflet-popup")
        popup.wait_for(state="visible", timeout=5000)
        text = popup.inner_text()
        if name == "map_public.html":
            assert "What is sold here" in text and "verdict" not in text.lower()
        elif name == "map.html":
            assert "Justified minimum [AKI]" in text
        else:
            assert "Recommended regular [AKI]" in text
        shot = save_screenshot(page, tmp_path / f"{name}.png")
        assert shot.stat().st_size > 20_000
    rec.assert_clean()


def test_report_opens_clean(browser, small_demo_run, tmp_path):
    out, _ = small_demo_run
    with open_local_html(browser, out / "report.html", wait_for=None) as (page, rec):
        assert page.locator("img.plot").count() >= 4
        assert page.evaluate(
            "() => [...document.images].every(i => i.complete && i.naturalWidth > 0)"
        )
        assert "vehicle maker's fuel recommendation" in page.inner_text("body")
        save_screenshot(page, tmp_path / "report.png")
    rec.assert_clean()
