"""The reviewer page in a real headless Chromium: paste texts, press Classify, read the cards.

What the page shows is compared with what the API answers for the same texts.
"""

from __future__ import annotations

from pathlib import Path

import httpx

from tests.helpers.net import free_port
from tests.helpers.service import settings_for, uvicorn_server

TEXTS = [
    "I was charged twice for the same ride, please refund me.",
    "The dock at the station is broken again 😞 and the chain snapped.",
]


def test_page_classifies_and_highlights_like_the_api(browser, registry_dir: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port())
    with uvicorn_server(settings) as server:
        api = httpx.post(f"{server.url}/v1/predict", json={"texts": TEXTS, "spans": 3}, timeout=30).json()
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        page_text = browser.find_element(By.TAG_NAME, "body").text
        assert "human review" in page_text and "bias" in page_text
        browser.find_element(By.ID, "texts").send_keys("\n".join(TEXTS))
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(TEXTS))
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        for card, result in zip(cards, api["results"], strict=True):
            assert card.find_element(By.CSS_SELECTOR, ".pill").text == result["label"]
            marks = card.find_elements(By.CSS_SELECTOR, ".text mark")
            shown = sorted(
                m.get_attribute("textContent")[: -len(m.find_element(By.TAG_NAME, "sup").get_attribute("textContent"))]
                for m in marks
            )
            assert shown == sorted(s["text"] for s in result["spans"])
        browser.save_screenshot(str(tmp_path / "page.png"))
        assert (tmp_path / "page.png").stat().st_size > 10_000
        wait.until(ec.presence_of_element_located((By.ID, "status")))
        # The Content-Security-Policy must not have blocked any of the page's own code.
        severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
        assert severe == []
