"""The reviewer page in a real headless Chromium: paste texts, queue them, read the cards, and
record verdicts with the keyboard.

What the page shows is compared with what the API answers for the same texts, and the verdicts
it records with what the registry and ``textsieve verdicts`` read back.
"""

from __future__ import annotations

import time
from pathlib import Path

import httpx
import pytest

from tests.helpers.gateway import Reply, gateway_in_front_of
from tests.helpers.graphemes import clustered, widened
from tests.helpers.net import free_port
from tests.helpers.service import MODEL, REVIEW_TOKEN, settings_for, uvicorn_server
from textsieve.cli import main
from textsieve.registry import open_registry

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
        for card, result, sent in zip(cards, api["results"], TEXTS, strict=True):
            assert card.find_element(By.CSS_SELECTOR, ".pill").text == result["label"]
            marks = card.find_elements(By.CSS_SELECTOR, ".text mark")
            shown = sorted(m.get_attribute("textContent") for m in marks)
            assert shown == sorted(s["text"] for s in result["spans"])
            # The ranks are drawn beside the highlights, not written into the text: selecting and
            # copying the text gives the text as sent (they were '<sup>' digits: "ride,1").
            assert sorted(m.get_attribute("data-rank") for m in marks) == [str(i) for i in range(1, len(marks) + 1)]
            copied = browser.execute_script(
                "const r = document.createRange(); r.selectNodeContents(arguments[0]);"
                "const s = getSelection(); s.removeAllRanges(); s.addRange(r); return s.toString();",
                card.find_element(By.CSS_SELECTOR, ".text"),
            )
            assert copied == sent
            count = len(result["spans"])
            summary = card.find_element(By.CSS_SELECTOR, "details summary").get_attribute("textContent")
            assert summary == f"{count} span{'s' if count != 1 else ''} in detail"
        browser.find_element(By.ID, "spans").clear()
        browser.find_element(By.ID, "spans").send_keys("1")
        browser.find_element(By.ID, "texts").clear()
        browser.find_element(By.ID, "texts").send_keys(TEXTS[0])
        browser.find_element(By.ID, "go").click()

        def summaries(d):  # type: ignore[no-untyped-def]  # read at once: the cards are redrawn meanwhile
            return d.execute_script(
                "return Array.from(document.querySelectorAll('details summary'), (e) => e.textContent)"
            )

        wait.until(lambda d: any(t.startswith("1 ") for t in summaries(d)))
        assert "1 span in detail" in summaries(browser), summaries(browser)  # not "1 spans"
        browser.save_screenshot(str(tmp_path / "page.png"))
        assert (tmp_path / "page.png").stat().st_size > 10_000
        wait.until(ec.presence_of_element_located((By.ID, "status")))
        # The Content-Security-Policy must not have blocked any of the page's own code.
        severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
        assert severe == []


def test_a_reviewer_corrects_and_confirms_with_the_keyboard_and_the_cli_sees_it(  # type: ignore[no-untyped-def]
    browser, registry_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server:
        api = httpx.post(f"{server.url}/v1/predict", json={"texts": TEXTS, "spans": 3}, timeout=30).json()
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        page_text = browser.find_element(By.TAG_NAME, "body").text
        # The shortcuts are on the page, beside the cautions.
        assert "confirm the label" in page_text and "next text" in page_text and "accountable people" in page_text
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        wait.until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        browser.find_element(By.ID, "texts").send_keys("\n".join(TEXTS))
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(TEXTS))
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        first = api["results"][0]
        labels = list(first["probabilities"])  # the reply's order, which the card numbers 1, 2, ...
        target = next(label for label in labels if label != first["label"])
        # C then the label's digit corrects the first text; the queue then moves to the second.
        ActionChains(browser).send_keys("c").send_keys(str(labels.index(target) + 1)).perform()
        wait.until(lambda d: cards[0].get_attribute("data-state") == "corrected")
        wait.until(lambda d: "current" in (cards[1].get_attribute("class") or ""))
        ActionChains(browser).send_keys("y").perform()
        wait.until(lambda d: cards[1].get_attribute("data-state") == "confirmed")
        assert f"corrected to {target} by Kwame" in cards[0].text
        # The token stays in this tab's session storage, never in the address.
        assert browser.execute_script("return sessionStorage.getItem('textsieve.reviewToken')") == REVIEW_TOKEN
        assert REVIEW_TOKEN not in browser.current_url
        severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
        assert severe == []
    with open_registry(registry_dir) as reg:
        stored = [(v.text, v.predicted_label, v.verdict_label, v.reviewer) for v in reg.verdicts.of(MODEL)]
    assert stored == [
        (TEXTS[0], first["label"], target, "Kwame"),
        (TEXTS[1], api["results"][1]["label"], api["results"][1]["label"], "Kwame"),
    ]
    capsys.readouterr()
    assert main(["verdicts", MODEL, "--registry", str(registry_dir)]) == 0
    out = capsys.readouterr().out
    assert f"→ {target}" in out and "confirmed" in out and "Kwame" in out
    assert any(line.split()[:4] == ["1", "2", "1", "50.0%"] for line in out.splitlines())


def test_a_shortcut_judges_the_card_that_holds_the_keyboard_focus(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Tabbing into the second card's buttons makes it the card the shortcuts act on: Y there
    confirms the second text, not the first one the queue had selected."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        browser.find_element(By.ID, "texts").send_keys("\n".join(TEXTS))
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(TEXTS))
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        in_second = "return document.querySelectorAll('article.result')[1].contains(document.activeElement)"
        for _ in range(20):
            if browser.execute_script(in_second):
                break
            ActionChains(browser).send_keys(Keys.TAB).perform()
        assert browser.execute_script(in_second)
        assert "current" in (cards[1].get_attribute("class") or "")
        ActionChains(browser).send_keys("y").perform()
        wait.until(lambda d: cards[1].get_attribute("data-state") == "confirmed")
        assert cards[0].get_attribute("data-state") == "pending"
    with open_registry(registry_dir) as reg:
        assert [v.text for v in reg.verdicts.of(MODEL)] == [TEXTS[1]]


def test_a_service_with_recording_off_is_not_blamed_on_the_reviewer_token(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """With no reviewer token configured the page shows the service's reason (403
    review-disabled) and does not send the reviewer to sign in again, which cannot help."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        browser.find_element(By.ID, "texts").send_keys(TEXTS[0])
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.result"))
        card = browser.find_element(By.CSS_SELECTOR, "article.result")
        card.find_element(By.CSS_SELECTOR, "button.confirm").click()
        note = card.find_element(By.CSS_SELECTOR, ".note")
        wait.until(lambda d: note.text)
        assert "recording verdicts is disabled" in note.text and "TEXTSIEVE_REVIEW_TOKEN" in note.text
        assert "sign in" not in note.text.lower()
        assert card.get_attribute("data-state") == "pending"


def test_a_long_unbroken_span_stays_inside_its_card(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """A span holding a long token (a pasted link, a hash) wraps in the span table instead of
    widening the whole page."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    text = "refund " + "0123456789abcdef" * 40 + " charged twice"
    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        api = httpx.post(f"{server.url}/v1/predict", json={"texts": [text], "spans": 3}, timeout=30).json()
        assert max(len(s["text"]) for s in api["results"][0]["spans"]) > 600
        browser.get(server.url + "/")
        browser.find_element(By.ID, "texts").send_keys(text)
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.result"))
        browser.find_element(By.CSS_SELECTOR, "article.result summary").click()
        widths = browser.execute_script(
            "const c = document.querySelector('article.result'); const e = document.documentElement;"
            "return [c.scrollWidth, c.clientWidth, e.scrollWidth, e.clientWidth]"
        )
        assert widths[0] <= widths[1] and widths[2] <= widths[3], widths


def test_a_right_to_left_text_is_shown_right_to_left(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Each text takes its direction from its own first strong character (dir=auto): an Arabic
    sentence's closing '!' sits at its left end, where it ends, not at its right end."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    texts = ["شكرا على إصلاح الفرامل بسرعة!", TEXTS[0]]
    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.get(server.url + "/")
        browser.find_element(By.ID, "texts").send_keys("\n".join(texts))
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        directions = browser.execute_script(
            "return Array.from(document.querySelectorAll('article.result .text'), (b) => getComputedStyle(b).direction)"
        )
        assert directions == ["rtl", "ltr"]
        # Where the first and the last character are drawn, in the box as it is shown.
        first, last = browser.execute_script(
            "const box = document.querySelector('article.result .text');"
            "const walk = document.createTreeWalker(box, NodeFilter.SHOW_TEXT); const nodes = [];"
            "while (walk.nextNode()) if (walk.currentNode.parentNode.tagName !== 'SUP') nodes.push(walk.currentNode);"
            "const x = (n, i) => { const r = document.createRange(); r.setStart(n, i); r.setEnd(n, i + 1);"
            "  return r.getBoundingClientRect().left; };"
            "const end = nodes[nodes.length - 1];"
            "return [x(nodes[0], 0), x(end, end.length - 1)]"
        )
        assert last < first


def test_a_refused_batch_leaves_the_queue_under_review(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Queueing too many texts shows the service's problem detail, naming the limit, above the
    queue; the cards still awaiting verdicts and the line saying what scored them stay."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port(), max_texts=3)) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        box = browser.find_element(By.ID, "texts")
        box.send_keys("\n".join(TEXTS))
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        batch = browser.find_element(By.ID, "batch").text
        box.clear()
        box.send_keys("\n".join(["refund please"] * 4))
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.error"))
        error = browser.find_element(By.CSS_SELECTOR, "article.error").text
        assert "4 texts in one request; the limit is 3 (TEXTSIEVE_MAX_TEXTS)" in error
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result:not(.error)")
        assert len(cards) == len(TEXTS)
        for card, text in zip(cards, TEXTS, strict=True):
            assert card.find_element(By.CSS_SELECTOR, ".text").text.startswith(text[:20])
        assert browser.find_element(By.ID, "batch").text == batch
        # The next accepted batch replaces the queue and the error with it.
        box.clear()
        box.send_keys("refund please")
        browser.find_element(By.ID, "go").click()
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 1)
        assert browser.find_elements(By.CSS_SELECTOR, "article.error") == []


def test_ctrl_enter_while_a_batch_is_scoring_sends_it_once(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The shortcut obeys the Queue button: while a batch is on its way (a slow network, made
    here by delaying the page's fetch), pressing Ctrl+Enter again sends nothing more."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.get(server.url + "/")
        browser.execute_script(
            "window.predictCalls = 0; const plain = window.fetch;"
            "window.fetch = (url, init) => {"
            "  if (String(url).includes('/v1/predict')) window.predictCalls += 1;"
            "  return new Promise((ok) => setTimeout(ok, 500)).then(() => plain(url, init)); };"
        )
        browser.find_element(By.ID, "texts").send_keys("\n".join(TEXTS))
        ActionChains(browser).key_down(Keys.CONTROL).send_keys(Keys.ENTER).send_keys(Keys.ENTER).send_keys(
            Keys.ENTER
        ).key_up(Keys.CONTROL).perform()
        WebDriverWait(browser, 30).until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        assert browser.execute_script("return window.predictCalls") == 1


def test_a_text_over_the_length_limit_is_named_by_its_line_in_the_box(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The service names the text by its place in the request (texts[1], blank lines already
    dropped, counted from 0); the page adds the line of the box the reviewer pasted it on."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port(), max_chars=60)) as server:
        browser.get(server.url + "/")
        box = browser.find_element(By.ID, "texts")
        browser.execute_script("arguments[0].value = arguments[1]", box, "refund me\n\n\n" + "charged twice " * 5)
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.error"))
        error = browser.find_element(By.CSS_SELECTOR, "article.error").text
        assert "texts[1] has 69 characters; the limit is 60 per text (TEXTSIEVE_MAX_CHARS)" in error
        assert "line 4" in error


def test_the_page_shows_either_the_sign_in_form_or_who_is_signed_in(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Before signing in there is no 'Reviewing as' line nor a Sign out button; after it, the
    form is gone; signing out brings it back."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        form, signed = browser.find_element(By.ID, "sign-in"), browser.find_element(By.ID, "signed")
        assert form.is_displayed() and not signed.is_displayed()
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        wait.until(lambda d: signed.is_displayed())
        assert not form.is_displayed() and "Reviewing as Kwame" in signed.text
        browser.find_element(By.ID, "sign-out").click()
        wait.until(lambda d: form.is_displayed())
        assert not signed.is_displayed()


def test_a_token_no_service_could_hold_is_refused_at_sign_in(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """A reviewer token is written as a Bearer token (RFC 6750 §2.1), as the service's own
    must be; one with other characters is refused by the sign-in form, not later by fetch."""
    from selenium.webdriver.common.by import By

    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        token = browser.find_element(By.ID, "token")
        token.send_keys("tok€n with spaces " * 2)
        browser.find_element(By.ID, "start").click()
        assert browser.find_element(By.ID, "sign-in").is_displayed()
        assert browser.execute_script("return sessionStorage.getItem('textsieve.reviewToken')") is None
        assert browser.execute_script("return arguments[0].validity.patternMismatch", token)
        assert "letters, digits" in (token.get_attribute("title") or "")  # what the browser's bubble adds
        # A token as the service's are written still signs in, spaces pasted around it too.
        token.clear()
        token.send_keys(f" {REVIEW_TOKEN} ")
        browser.find_element(By.ID, "start").click()
        assert browser.find_element(By.ID, "signed").is_displayed()
        assert browser.execute_script("return sessionStorage.getItem('textsieve.reviewToken')") == REVIEW_TOKEN


# What a gateway in front of the service answers while the service is down, slow or shedding
# load; tests/helpers/gateway.py answers it instead of forwarding.
PROXY_PAGE_502 = b"<html><head><title>502 Bad Gateway</title></head><body><h1>502 Bad Gateway</h1></body></html>"
HTML = (("Content-Type", "text/html"),)


def _sign_in(browser, name: str) -> None:  # type: ignore[no-untyped-def]
    """Type ``name`` and the review token into the sign-in form and send it with Enter."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    browser.find_element(By.ID, "reviewer").send_keys(name)
    browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN + Keys.ENTER)


def _queue(browser, texts: list[str]) -> None:  # type: ignore[no-untyped-def]
    from selenium.webdriver.common.by import By

    box = browser.find_element(By.ID, "texts")
    box.clear()
    box.send_keys("\n".join(texts))
    browser.find_element(By.ID, "go").click()


def test_a_gateway_reply_that_is_not_the_services_is_named_by_its_status(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """A batch answered by a gateway (an HTML 502, an empty 503 or 504, a 429) is shown with its
    status and reason phrase and, for 503 and 429, the wait its Retry-After asks (RFC 9110
    §10.2.3, seconds or an HTTP-date); before, the page showed 'request failed: SyntaxError'.
    The queue under review stays as it was."""
    from email.utils import formatdate

    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with (
        uvicorn_server(settings_for(registry_dir, port=free_port())) as server,
        gateway_in_front_of(server.url) as gateway,
    ):
        browser.get(gateway.url + "/")
        wait = WebDriverWait(browser, 30)
        _queue(browser, TEXTS)
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(TEXTS))
        batch = browser.find_element(By.ID, "batch").text
        # The service's own refusal when overloaded (service/web/problems.py's detail), as a
        # gateway might replay it: its detail stays first, the wait is added.
        overloaded = (
            b'{"type":"/problems/overloaded","title":"This replica is at capacity","status":503,'
            b'"detail":"this replica is at capacity: retry after the Retry-After seconds, or on another replica"}'
        )
        cases = [
            (
                Reply(502, "Bad Gateway", PROXY_PAGE_502, HTML),
                "the server answered 502 Bad Gateway, not a problem+json reply",
            ),
            (Reply(502, "Bad Gateway", PROXY_PAGE_502, HTML), "Try again in a moment"),
            # No reason phrase (RFC 9112 §4 allows it): RFC 9110 §15.6.5's is shown.
            (Reply(504, "", b""), "the server answered 504 Gateway Timeout, not a problem+json reply"),
            (Reply(503, "Service Unavailable", b"", (("Retry-After", "2"),)), "503 Service Unavailable"),
            (Reply(503, "Service Unavailable", b"", (("Retry-After", "2"),)), "Try again in 2 s"),
            # An IMF-fixdate five minutes ahead (RFC 9110 §5.6.7, written by Python's email.utils).
            (Reply(429, "Too Many Requests", b"", (("Retry-After", "{in 5 min}"),)), "Try again in 5 min"),
            (
                Reply(
                    503,
                    "Service Unavailable",
                    overloaded,
                    (("Content-Type", "application/problem+json"), ("Retry-After", "2")),
                ),
                "or on another replica (try again in 2 s)",
            ),
        ]
        for reply, expected in cases:
            headers = tuple(
                (k, formatdate(time.time() + 300, usegmt=True) if v == "{in 5 min}" else v) for k, v in reply.headers
            )
            gateway.answer("POST", "/v1/predict", Reply(reply.status, reply.reason, reply.body, headers))
            browser.execute_script("document.querySelector('#queue .error')?.remove()")
            _queue(browser, ["refund please"])
            wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.error"))
            error = browser.find_element(By.CSS_SELECTOR, "article.error").text
            assert expected in error and "SyntaxError" not in error, (reply.status, error)
            assert "Nothing was scored" in error or reply.body == overloaded, error
            cards = browser.find_elements(By.CSS_SELECTOR, "article.result:not(.error)")
            assert len(cards) == len(TEXTS) and browser.find_element(By.ID, "batch").text == batch
        assert len(gateway.answered) == len(cases)
        # The service back, the next batch replaces the queue.
        gateway.forward("POST", "/v1/predict")
        _queue(browser, ["refund please"])
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 1)
        assert browser.find_elements(By.CSS_SELECTOR, "article.error") == []


def test_a_gateway_reply_on_verdicts_status_and_models_is_named_by_its_status(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Every other call the page makes says what answered too: the readiness line (which said
    'service unreachable'), the model list (which failed silently) and a verdict (which showed
    'request failed: SyntaxError'); the card then still awaits its verdict, and records it once
    the service is back."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server, gateway_in_front_of(server.url) as gateway:
        gateway.answer("GET", "/readyz", Reply(503, "Service Unavailable", b""))
        gateway.answer("GET", "/v1/models", Reply(504, "", b""))
        browser.get(gateway.url + "/")
        wait = WebDriverWait(browser, 30)
        status, models = browser.find_element(By.ID, "status"), browser.find_element(By.ID, "models-note")
        wait.until(lambda d: status.text != "checking…" and models.text)
        assert "503 Service Unavailable" in status.text
        assert "504 Gateway Timeout, not a problem+json reply" in models.text
        assert "default model still serves" in models.text
        gateway.forward("GET", "/readyz")
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        _queue(browser, TEXTS[:1])
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.result"))
        wait.until(lambda d: "ready" in (status.get_attribute("class") or ""))
        card = browser.find_element(By.CSS_SELECTOR, "article.result")
        note = card.find_element(By.CSS_SELECTOR, ".note")
        for reply, expected in [
            (
                Reply(502, "Bad Gateway", PROXY_PAGE_502, HTML),
                "the server answered 502 Bad Gateway, not a problem+json reply",
            ),
            (Reply(503, "Service Unavailable", b"", (("Retry-After", "3"),)), "Try again in 3 s"),
        ]:
            gateway.answer("POST", "/v1/verdicts", reply)
            browser.execute_script("arguments[0].textContent = ''", note)
            card.find_element(By.CSS_SELECTOR, "button.confirm").click()
            wait.until(lambda d: note.text)
            assert expected in note.text and "SyntaxError" not in note.text, note.text
            assert "not confirmed as recorded" in note.text and "sign in" not in note.text.lower()
            assert card.get_attribute("data-state") == "pending"
        gateway.forward("POST", "/v1/verdicts")
        card.find_element(By.CSS_SELECTOR, "button.confirm").click()
        wait.until(lambda d: card.get_attribute("data-state") == "confirmed")
    with open_registry(registry_dir) as reg:
        assert [v.text for v in reg.verdicts.of(MODEL)] == [TEXTS[0]]


def test_a_verdict_whose_reply_a_gateway_lost_is_recorded_once_when_pressed_again(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The gateway passes the verdict to the service, which stores it, then answers the page 504
    itself. The card says the verdict is not confirmed and that pressing again is safe; pressing
    again sends the card's same Idempotency-Key (draft-ietf-httpapi-idempotency-key-header), so the
    service answers with the verdict it stored: one verdict in the registry, not two (before, two)."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server, gateway_in_front_of(server.url) as gateway:
        browser.get(gateway.url + "/")
        wait = WebDriverWait(browser, 30)
        browser.find_element(By.ID, "reviewer").send_keys("Kwame")
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        _queue(browser, TEXTS[:1])
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.result"))
        card = browser.find_element(By.CSS_SELECTOR, "article.result")
        note = card.find_element(By.CSS_SELECTOR, ".note")
        gateway.answer("POST", "/v1/verdicts", Reply(504, "Gateway Timeout", b"", after_forwarding=True))
        card.find_element(By.CSS_SELECTOR, "button.confirm").click()
        wait.until(lambda d: note.text)
        assert gateway.dropped == [201], "the service stored the verdict; the page got the gateway's 504"
        assert "504 Gateway Timeout" in note.text and "not confirmed as recorded" in note.text, note.text
        assert "Pressing the button again is safe" in note.text
        assert card.get_attribute("data-state") == "pending"
        with open_registry(registry_dir) as reg:
            stored = reg.verdicts.of(MODEL)
        assert len(stored) == 1
        gateway.forward("POST", "/v1/verdicts")
        card.find_element(By.CSS_SELECTOR, "button.confirm").click()
        wait.until(lambda d: card.get_attribute("data-state") == "confirmed")
        assert f"#{stored[0].id}" in card.find_element(By.CSS_SELECTOR, ".verdict").text
    with open_registry(registry_dir) as reg:
        assert reg.verdicts.of(MODEL) == stored


# Texts whose spans, from the tiny test model, start or end inside a grapheme cluster: the
# tokenizer makes a skin tone and each regional indicator a token of its own and splits at a
# zero-width joiner. Clusters are marked as tests/helpers/graphemes.py reads them.
CLUSTERED = [
    "my card |👩🏽\u200d💻| charged twice",
    "thanks |👨\u200d👩\u200d👧\u200d👦| charged twice",
    "the chain snapped |🇫🇷||👍🏿| brake fixed",
    "refund |🇫🇷||🇫🇷| ok then",
    "|e\u0301| refund |क्ष||मा| क|रें| |👍🏿| charged",
    "|👩🏽\u200d💻| fixed it |👍🏿|",
    # Several places a span may start inside a cluster, so that some do whatever the tiny model
    # learnt (its training data changes now and then; the texts above alone stopped doing it).
    "|🇫🇷||🇫🇷||🇫🇷| refund",
    "charged |🇫🇷||🇫🇷||🇫🇷| twice",
    "|👨\u200d👩\u200d👧\u200d👦| broken brake",
    "great |👩🏽\u200d💻| thanks |👍🏿| great",
]


def test_a_highlight_never_splits_a_character(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Every highlight boundary in the page is a grapheme cluster boundary (UAX #29; the
    clusters written down by hand in tests/helpers/graphemes.py), and each highlight holds its
    span's whole text (the API's text[start:end]): emoji with skin tones and ZWJ sequences,
    flags, a combining accent and a Devanagari conjunct."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    texts, bounds = zip(*(clustered(m) for m in CLUSTERED), strict=True)
    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        api = httpx.post(f"{server.url}/v1/predict", json={"texts": list(texts), "spans": 20}, timeout=30).json()
        inside = {"start": 0, "end": 0}
        for text, bound, result in zip(texts, bounds, api["results"], strict=True):
            for span in result["spans"]:
                assert text[span["start"] : span["end"]] == span["text"]  # the API's promise
                for side in ("start", "end"):
                    inside[side] += span[side] not in bound
        # What this test is about: the API's spans split clusters at both ends.
        assert inside["start"] >= 1 and inside["end"] >= 1, inside
        browser.get(server.url + "/")
        browser.find_element(By.ID, "spans").clear()
        browser.find_element(By.ID, "spans").send_keys("20")
        browser.execute_script(
            "arguments[0].value = arguments[1]", browser.find_element(By.ID, "texts"), "\n".join(texts)
        )
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(
            lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(texts)
        )
        # Each card's text as shown: [piece, highlighted?] in order, the ranks (sup) left out.
        shown = browser.execute_script(
            "return Array.from(document.querySelectorAll('article.result .text'), (box) =>"
            "  Array.from(box.childNodes, (n) => n.nodeType === Node.TEXT_NODE ? [n.data, false]"
            "    : [n.firstChild.data, true]))"
        )
    for text, bound, result, pieces in zip(texts, bounds, api["results"], shown, strict=True):
        assert "".join(piece for piece, _ in pieces) == text
        marks, at = [], 0
        for piece, highlighted in pieces:
            if highlighted:
                marks.append((at, at + len(piece)))  # Python counts code points, as the API does
            at += len(piece)
        for start, end in marks:
            assert start in bound and end in bound, (text, text[start:end])
        for span in result["spans"]:
            assert any(a <= span["start"] and span["end"] <= b for a, b in marks), (text, span["text"])
        # Each highlight is the union of its spans widened to whole clusters, no wider; spans
        # that met inside one cluster share one highlight.
        for a, b in marks:
            held = [widened(bound, s["start"], s["end"]) for s in result["spans"] if a <= s["start"] < b]
            assert held and (min(w[0] for w in held), max(w[1] for w in held)) == (a, b), (text, text[a:b])


def test_the_queue_fits_a_320_px_wide_screen(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """On a 320 CSS px wide screen (WCAG 2.1 SC 1.4.10 Reflow's width) with the span tables
    open, nothing is wider than the screen, and no word of a span is broken across lines; the
    table scrolls inside its card instead, and the keyboard reaches that scroller (a named region)."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.execute_cdp_cmd(
            "Emulation.setDeviceMetricsOverride", {"width": 320, "height": 900, "deviceScaleFactor": 1, "mobile": True}
        )
        browser.get(server.url + "/")
        assert browser.execute_script("return innerWidth") == 320
        _queue(browser, TEXTS)
        WebDriverWait(browser, 30).until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        for summary in browser.find_elements(By.CSS_SELECTOR, "article.result summary"):
            summary.click()
        widths = browser.execute_script(
            "const e = document.documentElement; return [e.scrollWidth, e.clientWidth,"
            " ...Array.from(document.querySelectorAll('article.result'), (c) => c.scrollWidth - c.clientWidth)]"
        )
        assert widths[0] <= widths[1] and all(extra <= 0 for extra in widths[2:]), widths
        # Each word of each span's cell is drawn on one line (one client rect per word).
        broken = browser.execute_script(
            "const out = []; for (const td of document.querySelectorAll('article.result td:nth-child(2)')) {"
            "  const node = td.firstChild; let at = 0;"
            "  for (const word of node.data.split(' ')) {"
            "    const r = document.createRange(); r.setStart(node, at); r.setEnd(node, at + word.length);"
            "    if (word && r.getClientRects().length > 1) out.push(word); at += word.length + 1; } }"
            "return out"
        )
        assert broken == []
        scroller = browser.find_element(By.CSS_SELECTOR, "article.result details > [role=region]")
        assert scroller.get_attribute("tabindex") == "0" and scroller.accessible_name


def test_a_screen_reader_hears_which_card_has_focus_and_what_happened(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The card the queue focuses is named by its place, label and probability (its accessible
    name as Chromium computes it, W3C Accessible Name and Description Computation 1.2); a
    refused batch is an alert and a verdict's outcome a status (WAI-ARIA 1.2 live regions), so
    they are read out without moving the focus."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN, max_texts=2)
    with uvicorn_server(settings) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        _queue(browser, TEXTS)
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        focused = browser.switch_to.active_element
        assert focused == cards[0]
        pill, conf = (cards[0].find_element(By.CSS_SELECTOR, c).text for c in (".pill", ".top .conf"))
        name = focused.accessible_name
        assert "#1" in name and pill in name and conf in name and "awaiting verdict" in name, name
        # Without signing in, Y explains why nothing was recorded, in the card's status.
        ActionChains(browser).send_keys("y").perform()
        note = cards[0].find_element(By.CSS_SELECTOR, ".note")
        wait.until(lambda d: note.text)
        assert note.aria_role == "status" and cards[0].find_element(By.CSS_SELECTOR, ".verdict").aria_role == "status"
        _queue(browser, ["refund please"] * 3)
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.error"))
        assert browser.find_element(By.CSS_SELECTOR, "article.error").aria_role == "alert"


def test_signing_in_and_out_by_keyboard_keeps_the_focus_on_the_page(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The sign-in form and the Sign out button hide themselves while they hold the focus; the
    focus then moves where the reviewer goes next (WCAG 2.1 SC 2.4.3 Focus Order): after signing
    in, to the card awaiting a verdict (Y then records it) or to the texts box; after signing
    out, to the name field. Before, it fell to the page's body and Tab started from the top."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    active = "const a = document.activeElement; return a === document.body ? 'body' : (a.id || a.className)"
    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        _sign_in(browser, "Kwame")
        wait.until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        assert browser.execute_script(active) == "texts"
        browser.find_element(By.ID, "sign-out").send_keys(Keys.ENTER)
        wait.until(lambda d: d.find_element(By.ID, "sign-in").is_displayed())
        assert browser.execute_script(active) == "reviewer"
        # Y before signing in sends the reviewer to the form; signing in brings them back to the card.
        _queue(browser, TEXTS[:1])
        wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.result"))
        ActionChains(browser).send_keys("y").perform()
        wait.until(lambda d: browser.execute_script(active) == "reviewer")
        ActionChains(browser).send_keys("Kwame", Keys.TAB, REVIEW_TOKEN, Keys.ENTER).perform()
        wait.until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        assert browser.execute_script(active) == "result current"
        ActionChains(browser).send_keys("y").perform()
        card = browser.find_element(By.CSS_SELECTOR, "article.result")
        wait.until(lambda d: card.get_attribute("data-state") == "confirmed")


# Script injection (CWE-79) through what reaches the page from callers and bundles: texts, span
# texts and labels, each trying to leave its element, its attribute or its URL (OWASP XSS
# Prevention Cheat Sheet, rules 1, 2 and 5). The page writes them as text nodes only.
HOSTILE = (
    '</script><script>window.__hit = "script"</script>',
    '"><img src=x onerror="window.__hit = \'img\'">',
    "javascript:window.__hit='url'",
    "'><svg onload=\"window.__hit = 'svg'\"></svg>",
)


def test_hostile_texts_and_labels_are_shown_as_text_and_run_nothing(  # type: ignore[no-untyped-def]
    browser, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    import json
    import shutil

    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    from tests.helpers.registries import edit_manifest

    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    labels = json.loads((bundle / "manifest.json").read_text())["labels"]
    hostile_labels = [f"{label}{HOSTILE[i % len(HOSTILE)]}" for i, label in enumerate(labels)]
    edit_manifest(bundle, {"labels": hostile_labels})
    with open_registry(tmp_path / "registry") as reg:
        reg.publish(bundle, MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="tests start here", actor="tests", force=True)
    texts = [f"{TEXTS[i % len(TEXTS)]} {h}" for i, h in enumerate(HOSTILE)]
    with uvicorn_server(settings_for(tmp_path / "registry", port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        scripts = len(browser.find_elements(By.TAG_NAME, "script"))
        _sign_in(browser, "<img src=x onerror=\"window.__hit = 'name'\">")
        browser.find_element(By.ID, "texts").send_keys("\n".join(texts))
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(
            lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == len(texts)
        )
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        for card, sent in zip(cards, texts, strict=True):
            assert card.find_element(By.CSS_SELECTOR, ".pill").text in hostile_labels
            assert card.find_element(By.CSS_SELECTOR, ".text").get_attribute("textContent") == sent
        body = browser.find_element(By.TAG_NAME, "body").get_attribute("textContent")
        assert all(label in body for label in hostile_labels), "each label is shown, as text"
        assert browser.execute_script("return window.__hit") is None
        assert len(browser.find_elements(By.TAG_NAME, "script")) == scripts
        for tag in ("img", "iframe", "a[href^='javascript']"):
            assert browser.find_elements(By.CSS_SELECTOR, tag) == [], f"a {tag} was injected"
        assert [e for e in browser.get_log("browser") if e["level"] == "SEVERE"] == []


def test_a_stored_label_with_a_reordering_character_is_shown_escaped_and_judged_as_stored(  # type: ignore[no-untyped-def]
    browser, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    """A version published before labels were held to names' rule may carry U+202E RIGHT-TO-LEFT
    OVERRIDE in a label: the page showed the rest of the card's line reversed ("1 · billing‮ · 2"),
    and U+200B made two labels look alike. The page shows such a character as its escape and records
    a verdict with the label as stored."""
    import json
    import shutil

    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    from tests.helpers.registries import edit_manifest, publish_unchecked_labels

    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    labels = json.loads((bundle / "manifest.json").read_text())["labels"]
    stored = [label + ("\u202e", "\u200b", "", "")[i % 4] for i, label in enumerate(labels)]
    shown = [label + ("\\u202e", "\\u200b", "", "")[i % 4] for i, label in enumerate(labels)]
    edit_manifest(bundle, {"labels": stored})
    with open_registry(tmp_path / "registry") as reg:
        assert publish_unchecked_labels(reg, bundle, MODEL) == 1
        reg.promote(MODEL, 1, "live", reason="stored before the rule", actor="tests", force=True)
    settings = settings_for(tmp_path / "registry", port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server:
        browser.get(server.url + "/")
        _sign_in(browser, "Kwame")
        WebDriverWait(browser, 30).until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        browser.find_element(By.ID, "texts").send_keys(TEXTS[0])
        browser.find_element(By.ID, "go").click()
        WebDriverWait(browser, 30).until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 1)
        card = browser.find_element(By.CSS_SELECTOR, "article.result")
        body = browser.find_element(By.TAG_NAME, "body").get_attribute("textContent")
        assert "\u202e" not in body and "\u200b" not in body
        buttons = card.find_elements(By.CSS_SELECTOR, ".choices button:not(.confirm)")
        assert [b.get_attribute("textContent") for b in buttons] == [f"{i + 1} · {s}" for i, s in enumerate(shown)]
        assert card.find_element(By.CSS_SELECTOR, ".pill").get_attribute("textContent") in shown
        assert [b.get_attribute("data-label") for b in buttons] == stored
        buttons[0].click()
        WebDriverWait(browser, 30).until(lambda d: card.get_attribute("data-state") in ("confirmed", "corrected"))
        assert [e for e in browser.get_log("browser") if e["level"] == "SEVERE"] == []
    with open_registry(tmp_path / "registry") as reg:
        assert [v.verdict_label for v in reg.verdicts.of(MODEL)] == [stored[0]]


def test_a_long_unbroken_name_or_note_does_not_widen_a_narrow_page(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """A reviewer's name may be 120 characters with no space (the service allows it), and a
    refusal's note can quote a long token; on a 360 CSS px screen (WCAG 2.1 SC 1.4.10 Reflow)
    neither may widen the page into a horizontal scroll, in the sign-in line, a card's verdict
    or its note. Before, such a name made the page 1,118 px wide."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    name = "Kwame" + "x" * 115
    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.execute_cdp_cmd(
            "Emulation.setDeviceMetricsOverride", {"width": 360, "height": 900, "deviceScaleFactor": 1, "mobile": True}
        )
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        _sign_in(browser, name)
        wait.until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        _queue(browser, TEXTS[:1] + ["refund " + "y" * 300])
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        card = browser.find_elements(By.CSS_SELECTOR, "article.result")[0]
        card.find_element(By.CSS_SELECTOR, "button.confirm").send_keys(Keys.ENTER)
        wait.until(lambda d: card.get_attribute("data-state") == "confirmed")
        assert name in card.find_element(By.CSS_SELECTOR, ".verdict").text
        widths = browser.execute_script(
            "const e = document.documentElement; return [e.scrollWidth, e.clientWidth,"
            " ...Array.from(document.querySelectorAll('article.result, #signed'),"
            " (c) => c.scrollWidth - c.clientWidth)]"
        )
        assert widths[0] <= widths[1] and all(extra <= 0 for extra in widths[2:]), widths


def test_the_page_has_landmarks_headings_and_visible_labels(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """What a screen reader lists (roles as Chromium computes them, WAI-ARIA 1.2 and HTML-AAM):
    one main landmark holding the forms and the queue, the footer as the page's contentinfo,
    a heading for each part (the queue included, so heading navigation reaches it) and, for
    every field, a label a sighted reviewer sees too (WCAG 2.1 SC 3.3.2; a placeholder vanishes
    as one types). Before, there was no main landmark, the queue had no heading and the texts
    box only an aria-label."""
    from selenium.webdriver.common.by import By

    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.get(server.url + "/")
        assert browser.find_element(By.TAG_NAME, "html").get_attribute("lang") == "en"
        mains = [e for e in browser.find_elements(By.CSS_SELECTOR, "body *") if e.aria_role == "main"]
        assert len(mains) == 1
        for inside in ("texts", "queue", "sign-in"):
            assert browser.execute_script(
                "return arguments[0].contains(document.getElementById(arguments[1]))", mains[0], inside
            ), inside
        assert browser.find_element(By.TAG_NAME, "footer").aria_role == "contentinfo"
        assert browser.find_element(By.TAG_NAME, "header").aria_role == "banner"
        headings = [h.text.lower() for h in browser.find_elements(By.CSS_SELECTOR, "h2")]
        assert any("queue" in h for h in headings), headings
        queue = browser.find_element(By.ID, "queue").find_element(By.XPATH, "./ancestor::section")
        assert queue.aria_role == "region" and "queue" in queue.accessible_name.lower()
        for field in browser.find_elements(By.CSS_SELECTOR, "input, select, textarea"):
            fid = field.get_attribute("id")
            labels = browser.find_elements(By.CSS_SELECTOR, f"label[for='{fid}']")
            assert labels and labels[0].is_displayed(), f"#{fid} has no visible label"
            assert field.accessible_name == labels[0].text, fid


def test_the_service_going_away_is_said_and_announced(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """The server stops while the page is open: queueing texts then shows why nothing was
    scored as an alert, and the readiness line in the header, a status (WAI-ARIA 1.2 live
    region), says the service is unreachable, so a screen reader hears it too. Before, the
    readiness line was a plain div nobody heard change."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port())) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        wait.until(lambda d: d.find_element(By.ID, "status").get_attribute("class") == "ready")
    _queue(browser, TEXTS[:1])
    wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "article.error"))
    error = browser.find_element(By.CSS_SELECTOR, "article.error")
    assert (
        error.aria_role == "alert" and "no reply from the service" in error.text and "Nothing was scored" in error.text
    )
    status = browser.find_element(By.ID, "status")
    wait.until(lambda d: status.get_attribute("class") == "down")
    assert status.aria_role == "status" and status.text == "service unreachable"


def test_a_shortcut_acts_only_while_the_focus_is_in_the_queue(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """Single-key shortcuts act only while the keyboard focus is in the queue (WCAG 2.1 SC 2.1.4
    Character Key Shortcuts: active only on focus). A Y typed on the Queue or Sign out button
    records nothing; before, it confirmed a card the reviewer might not even see."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        _sign_in(browser, "Kwame")
        _queue(browser, TEXTS)
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        for outside in ("go", "sign-out"):
            browser.execute_script("document.getElementById(arguments[0]).focus()", outside)
            ActionChains(browser).send_keys("y").perform()
            time.sleep(1)
            states = [c.get_attribute("data-state") for c in browser.find_elements(By.CSS_SELECTOR, "article.result")]
            assert states == ["pending", "pending"], (outside, states)
        # In the queue the same key confirms the card that holds the focus.
        browser.find_elements(By.CSS_SELECTOR, "article.result")[0].click()
        ActionChains(browser).send_keys("y").perform()
        card = browser.find_elements(By.CSS_SELECTOR, "article.result")[0]
        wait.until(lambda d: card.get_attribute("data-state") == "confirmed")


def test_a_verdict_by_button_keeps_the_focus_in_the_queue(browser, registry_dir: Path) -> None:  # type: ignore[no-untyped-def]
    """A keyboard reviewer presses Enter on the last card's confirm button: the verdict disables
    that button, and the focus must not fall with it to the page's body (WCAG 2.1 SC 2.4.3 Focus
    Order), where Tab starts again from the top and the queue's shortcuts do not act. It stays on
    the card, so P goes back to the previous one. Before, the focus was lost to the body."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    with uvicorn_server(settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)) as server:
        browser.get(server.url + "/")
        wait = WebDriverWait(browser, 30)
        _sign_in(browser, "Kwame")
        _queue(browser, TEXTS)
        wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "article.result")) == 2)
        cards = browser.find_elements(By.CSS_SELECTOR, "article.result")
        browser.execute_script("arguments[0].focus()", cards[1].find_element(By.CSS_SELECTOR, "button.confirm"))
        ActionChains(browser).send_keys(Keys.ENTER).perform()
        wait.until(lambda d: cards[1].get_attribute("data-state") == "confirmed")
        time.sleep(0.3)  # Chromium moves the focus off a disabled button at its next frame
        assert browser.switch_to.active_element == cards[1]
        ActionChains(browser).send_keys("p").perform()
        wait.until(lambda d: d.switch_to.active_element == cards[0])
        assert "current" in (cards[0].get_attribute("class") or "")


# Names the service refuses at a verdict (registry/names.py validate_reviewer: textsieve/printable.py's
# characters, 1–120 after stripping), each with why.
REFUSED_NAMES = [
    pytest.param("Priya\u202e", id="U+202E RIGHT-TO-LEFT OVERRIDE (Trojan Source, CVE-2021-42574)"),
    pytest.param("Pr\u200biya", id="U+200B ZERO WIDTH SPACE: would pass for Priya"),
    pytest.param("Priya\x07", id="BEL, a control character"),
    pytest.param("Priya\ue000", id="private use"),
    pytest.param("\ufeffPriya", id="U+FEFF, which JavaScript's trim removes and Python's strip keeps"),
    pytest.param("Priya \u200d", id="a joiner joining nothing"),
    pytest.param("   ", id="only spaces"),
    pytest.param("P" * 121, id="121 characters"),
    pytest.param("\U0001f469" * 125 + "\u202e", id="126 characters, 252 UTF-16 units, and U+202E: both said"),
]


@pytest.mark.parametrize("name", REFUSED_NAMES)
def test_sign_in_refuses_a_name_the_service_would_refuse_in_its_words(browser, registry_dir: Path, name: str) -> None:  # type: ignore[no-untyped-def]
    """Before: the page signed in any non-empty name, and the service refused it at the first verdict, after
    the reviewer had read a card. Now the sign-in says what the service says (its problem detail, asked here
    of the real service), and a name the service records, joiners in an emoji sequence included, signs in."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    settings = settings_for(registry_dir, port=free_port(), review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server:
        verdict = {
            "model": MODEL,
            "version": 1,
            "text": TEXTS[0],
            "predicted_label": "billing",
            "predicted_probability": 0.9,
            "verdict_label": "billing",
            "reviewer": name,
        }
        auth = {"Authorization": f"Bearer {REVIEW_TOKEN}"}
        reply = httpx.post(f"{server.url}/v1/verdicts", json=verdict, headers=auth, timeout=30)
        assert reply.status_code == 422, reply.text
        said = reply.json()["detail"]

        browser.get(server.url + "/")
        field = browser.find_element(By.ID, "reviewer")
        browser.execute_script("arguments[0].value = arguments[1]", field, name)  # as pasted
        browser.find_element(By.ID, "token").send_keys(REVIEW_TOKEN)
        browser.find_element(By.ID, "start").click()
        problem = browser.find_element(By.ID, "name-problem")
        WebDriverWait(browser, 10).until(lambda d: problem.is_displayed())
        assert problem.get_attribute("textContent") == said
        assert problem.get_attribute("role") == "alert" and field.get_attribute("aria-invalid") == "true"
        assert browser.find_element(By.ID, "sign-in").is_displayed()
        assert not browser.find_element(By.ID, "signed").is_displayed()
        assert browser.execute_script("return sessionStorage.getItem('textsieve.reviewer')") is None

        good = "Ana \U0001f469\u200d\U0001f4bb"  # a ZWJ between two visible characters (Unicode TR #51)
        field.clear()
        field.send_keys("x")  # typing clears the refusal
        assert not problem.is_displayed()
        browser.execute_script("arguments[0].value = arguments[1]", field, f"  {good} ")
        browser.find_element(By.ID, "start").click()
        WebDriverWait(browser, 10).until(lambda d: d.find_element(By.ID, "signed").is_displayed())
        assert browser.execute_script("return sessionStorage.getItem('textsieve.reviewer')") == good
        accepted = httpx.post(
            f"{server.url}/v1/verdicts", json={**verdict, "reviewer": f"  {good} "}, headers=auth, timeout=30
        )
        assert accepted.status_code == 201 and accepted.json()["reviewer"] == good, accepted.text
