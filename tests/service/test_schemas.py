"""The request schemas (service/web/schemas.py) where they do more than validate."""

from __future__ import annotations

import json
import sys

import pytest

from textsieve.service.web.schemas import PredictRequest

TEXTS = ["caf\u00e9 \u2014 the card was charged twice", "\u7f8e\u54b2: \U0001f6b2 returned", "plain ascii"]


@pytest.mark.parametrize("parse", ["json", "python"])
def test_predict_texts_keep_their_utf8_form_for_the_pickler(parse: str) -> None:
    # The event loop pickles the validated strs for a worker; CPython's C pickler copies a UTF-8 form
    # kept on a str (Modules/_pickle.c, save_unicode: callgrind names it) instead of encoding it
    # again, and __sizeof__ counts that form: the UTF-8 bytes and a NUL. An ASCII str is its own.
    body = {"texts": [json.loads(json.dumps(t)) for t in TEXTS]}
    request = (
        PredictRequest.model_validate_json(json.dumps(body, ensure_ascii=True))
        if parse == "json"
        else PredictRequest.model_validate(body)
    )
    assert request.texts == TEXTS
    for text in request.texts:
        plain = "".join(list(text))
        kept = 0 if text.isascii() else len(text.encode("utf-8")) + 1
        assert sys.getsizeof(text) == sys.getsizeof(plain) + kept, text
