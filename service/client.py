"""``textsieve predict``, ``drift`` and ``health``: small clients of a running service, with their flags.

httpx is imported inside the handlers: this module is imported whenever the command line is built.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from typing import TYPE_CHECKING, Any, TextIO

from textsieve.environment import DEFAULT_URL, check_url, service_url
from textsieve.errors import InputError, UnavailableError
from textsieve.registry.tables import one_line, one_line_part

if TYPE_CHECKING:
    import httpx
    from pydantic import BaseModel

BOLD, RESET = "\x1b[1m", "\x1b[0m"
URL_HELP = f"address of the running service (default: $TEXTSIEVE_URL, else {DEFAULT_URL})"


def _timeout(text: str) -> float:
    """A ``--timeout``: seconds, more than 0 (httpx would wait for ever on none, and a NaN or a
    negative value reached the socket as a ValueError traceback)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number of seconds: {text!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"must be a number of seconds more than 0, not {text}")
    return value


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``predict``, ``drift`` and ``health`` to the ``textsieve`` command."""
    p = sub.add_parser("predict", help="ask a running service; prints label, probabilities and spans")
    p.add_argument("texts", nargs="+", help="texts to classify, one argument each")
    p.add_argument("--url", help=URL_HELP)
    p.add_argument("--model", help="model to ask (needed when the service serves several)")
    p.add_argument("--version", type=int, help="pin a version of the model (default: its live version)")
    p.add_argument("--spans", type=int, default=3, help="most n-gram spans to show per text")
    p.add_argument("--json", action="store_true", help="print the raw JSON reply")
    p.add_argument("--timeout", type=_timeout, default=60.0, help="seconds to wait for the reply")
    p.set_defaults(func=cli_predict)

    p = sub.add_parser("drift", help="drift signals of a model's live texts on a running service, with PSI bands")
    p.add_argument("model", help="model name")
    p.add_argument("--url", help=URL_HELP)
    p.add_argument("--json", action="store_true", help="print the raw JSON reply")
    p.add_argument("--timeout", type=_timeout, default=30.0, help="seconds to wait for the reply")
    p.set_defaults(func=cli_drift)

    p = sub.add_parser("health", help="exit 0 when the service is ready, 1 otherwise, with one line of why")
    p.add_argument("--url", help=URL_HELP)
    p.add_argument("--timeout", type=_timeout, default=5.0, help="seconds to wait for the reply")
    p.set_defaults(func=cli_health)


def _base(url: str) -> str:
    """The service's base address; a probe's own URL (``…/readyz``, ``…/healthz``), as a deployment
    script may hold it, stands for the service it probes."""
    try:
        check_url(url)
    except ValueError as exc:
        raise InputError(f"--url {url!r}: {exc}") from exc
    base = url.rstrip("/")
    for probe in ("/readyz", "/healthz"):
        base = base.removesuffix(probe)
    return base


def _ok(base: str, method: str, path: str, timeout: float, **kwargs: Any) -> Any:
    """One call to the service, answered 200: else UnavailableError (unreachable, 5xx) or
    InputError (4xx), each with the problem's detail."""
    import httpx

    try:
        with httpx.Client(timeout=timeout) as client:
            r = client.request(method, f"{base}{path}", **kwargs)
    except httpx.HTTPError as exc:
        raise UnavailableError(
            f"cannot reach {base} ({type(exc).__name__}: {exc}); is 'textsieve serve' running?"
        ) from exc
    if r.status_code >= 500:
        raise UnavailableError(_problem_detail(r))
    if r.status_code != 200:
        raise InputError(_problem_detail(r))
    return r


def _reply(r: httpx.Response, shape: type[BaseModel]) -> dict[str, Any]:
    """A 200 reply's JSON object, checked against the service's own response model (``shape``,
    from ``service/web/schemas.py``): another server's reply (HTML, other JSON, a field of another
    type) is one line saying so, not a JSONDecodeError, KeyError or TypeError from printing it."""
    from pydantic import ValidationError

    try:
        body = r.json()
    except ValueError:
        body = None
    if not isinstance(body, dict):
        raise UnavailableError(
            f"{r.request.url} answered HTTP {r.status_code} but not as textsieve does "
            f"({r.headers.get('content-type', 'no content type')}); is --url the textsieve service?"
        )
    try:
        shape.model_validate(body)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(part) for part in first["loc"]) or "the reply"
        raise UnavailableError(
            f"{r.request.url} answered HTTP {r.status_code} but not as textsieve does "
            f"({where}: {first['msg']}); is --url the textsieve service, of this version?"
        ) from None
    return body


def _predictions(r: httpx.Response, texts: list[str]) -> dict[str, Any]:
    """A predict reply with one result for each text sent, each naming a label it gives a probability."""
    from textsieve.service.web.schemas import PredictResponse

    reply = _reply(r, PredictResponse)
    results = reply["results"]
    bad = (
        f"{len(results)} results for {len(texts)} texts"
        if len(results) != len(texts)
        else next(
            (
                f"result {i}'s label is not among its probabilities"
                for i, res in enumerate(results, 1)
                if res["label"] not in res["probabilities"]
            ),
            None,
        )
    )
    if bad:
        raise UnavailableError(f"{r.request.url} answered HTTP 200 but not as textsieve does ({bad})")
    return reply


def _problem_detail(r: httpx.Response) -> str:
    if r.is_redirect:
        return (
            f"HTTP {r.status_code} {r.reason_phrase}: {r.request.url} sends callers to "
            f"{r.headers.get('location', 'no address')}; give --url the service's own address"
        )
    try:
        body = r.json()
    except ValueError:
        return f"HTTP {r.status_code} {r.reason_phrase}"
    detail = body.get("detail") if isinstance(body, dict) else None
    return f"HTTP {r.status_code}: {detail}" if detail else f"HTTP {r.status_code} {r.reason_phrase}"


def highlight(text: str, spans: list[dict[str, Any]], *, ansi: bool) -> str:
    """The text with its spans marked: bold on a terminal, [brackets]ⁿ otherwise; on one line, its
    control characters shown as escapes (``registry/tables.py``), so only our own marks reach the terminal.
    A ZWNJ or ZWJ at a span's edge is judged within the whole text: between visible characters it stays."""
    out: list[str] = []
    at = 0
    ranked = sorted(enumerate(spans, 1), key=lambda item: item[1]["start"])
    for rank, s in ranked:
        if s["start"] < at:
            continue
        out.append(one_line_part(text, at, s["start"]))
        piece = one_line_part(text, s["start"], s["end"])
        out.append(f"{BOLD}{piece}{RESET}" if ansi else f"[{piece}]{rank}")
        at = s["end"]
    out.append(one_line_part(text, at, len(text)))
    return "".join(out)


def render(texts: list[str], reply: dict[str, Any], *, ansi: bool) -> str:
    from textsieve.registry.tables import table, terminal_width

    lines: list[str] = []
    for i, (text, res) in enumerate(zip(texts, reply["results"], strict=True), 1):
        label = res["label"]
        probs = sorted(res["probabilities"].items(), key=lambda kv: -kv[1])
        head = f"{BOLD}{one_line(label)}{RESET}" if ansi else one_line(label)
        lines.append(
            f"[{i}] {head}  {100 * res['probabilities'][label]:.1f} %   "
            f"({one_line(str(reply['model']))} v{reply['version']})"
        )
        lines.append(f"    {highlight(text, res['spans'], ansi=ansi)}")
        lines.append("    probabilities  " + "  ".join(f"{one_line(k)} {v:.4f}" for k, v in probs))
        if res["spans"]:
            rows = [
                (n, f"{s['weight']:.3f}", s["width"], f"{s['start']}-{s['end']}", s["text"])
                for n, s in enumerate(res["spans"], 1)
            ]
            width = terminal_width()
            spans = table(
                ["#", "weight", "tokens", "chars", "span"],
                rows,
                wrap_columns=(4,),
                width=None if width is None else width - 4,
            )
            lines += ["    " + line for line in spans.splitlines()]
        extra = " · truncated" if res["truncated"] else ""
        # Present only when the model has a review threshold (textsieve review-threshold).
        if res.get("needs_review"):
            extra += " · needs review"
        lines.append(f"    tokens {res['tokens']} · unknown {res['unknown']}{extra}")
    return "\n".join(lines)


def _ansi(stream: TextIO) -> bool:
    return stream.isatty() and not os.environ.get("NO_COLOR")


def _utf8_argument(value: str, what: str) -> str:
    """``value`` as given on the command line; bytes that are not UTF-8 (which Python keeps as lone
    surrogates) cannot go into a JSON request: one line saying so, not httpx's UnicodeEncodeError."""
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise InputError(
            f"{what} is not valid UTF-8 (bytes that do not decode at character {exc.start}); pass UTF-8 text"
        ) from None
    return value


def cli_predict(args: argparse.Namespace) -> int:
    for i, text in enumerate(args.texts):
        _utf8_argument(text, f"text {i + 1}")
    if args.model:
        _utf8_argument(args.model, "--model")
    base = _base(service_url(args.url))
    payload: dict[str, Any] = {"texts": list(args.texts), "spans": args.spans}
    if args.model:
        payload["model"] = args.model
    if args.version is not None:
        payload["version"] = args.version
    r = _ok(base, "POST", "/v1/predict", args.timeout, json=payload)
    reply = _predictions(r, list(args.texts))
    if args.json:
        print(r.text)
    else:
        print(render(list(args.texts), reply, ansi=_ansi(sys.stdout)))
    return 0


def render_drift(reply: dict[str, Any]) -> str:
    """One block per served version: the window, the rates beside the baseline's, and each signal's band."""
    model = reply["model"]
    if not reply["versions"]:
        return f"{model}: this replica serves no version of it with a drift window (TEXTSIEVE_DRIFT off, or not served)"
    lines: list[str] = []
    whose = "this replica's" if reply.get("scope") == "replica" else "the replicas' shared"
    for v in reply["versions"]:
        base = v["baseline"]
        lines.append(
            f"{model} v{v['version']} ({v['role']}): {v['texts']:,} live texts in {whose} window "
            f"of {v['window_texts']:,}"
        )
        if base is None:
            lines.append(f"  {one_line(str(v['detail']))}")
            lines.append("")
            continue

        def rate(x: float | None) -> str:
            return "-" if x is None else f"{x:.2%}"

        lines.append(
            f"  unknown tokens {rate(v['unknown_rate'])} (baseline {rate(base['unknown_rate'])}) · "
            f"truncated {rate(v['truncation_rate'])} (baseline {rate(base['truncation_rate'])}) · "
            f"baseline: {base['texts']:,} {base['source']} texts"
        )
        rows = [("SIGNAL", "PSI", "JS DISTANCE", "BAND")]
        for s in v["signals"]:
            psi = "-" if s["psi"] is None else f"{s['psi']:.4f}"
            js = "-" if s["js_distance"] is None else f"{s['js_distance']:.4f}"
            band = s["band"]
            if band is None and s["psi"] is not None:
                least = s.get("min_texts")
                band = f"- (from {least:,} texts)" if least else "- (baseline too small)"
            rows.append((s["name"], psi, js, band or "-"))
        widths = [max(len(r[c]) for r in rows) for c in range(4)]
        for r in rows:
            cells = [r[0].ljust(widths[0]), r[1].rjust(widths[1]), r[2].rjust(widths[2]), r[3]]
            lines.append("  " + "  ".join(cells))
        lines.append(f"  {one_line(str(v['detail']))}")
        lines.append("")
    lines.append(
        "Bands: PSI < 0.1 stable, 0.1-0.25 watch, > 0.25 act (common practice), given once the window is large "
        "enough that sampling noise alone would read stable (Yurdakul, 2018). Drift says the texts changed, "
        "not that the labels are wrong: have people review a sample before acting."
    )
    return "\n".join(lines)


def cli_drift(args: argparse.Namespace) -> int:
    import urllib.parse

    from textsieve.registry.names import validate_model_name

    # Said here, not by the server: "../x" or "a/b" came back as "no such path", and as "cannot reach"
    # when the service was down, which is exit 1, a retry, for a name that can never work.
    validate_model_name(args.model)
    base = _base(service_url(args.url))
    from textsieve.service.web.schemas import DriftView

    r = _ok(base, "GET", f"/v1/models/{urllib.parse.quote(args.model, safe='')}/drift", args.timeout)
    reply = _reply(r, DriftView)
    if reply["model"] != args.model:
        raise UnavailableError(
            f"{r.request.url} answered with the drift of {one_line(str(reply['model']))!r}, not of "
            f"{args.model!r}; is --url the textsieve service?"
        )
    print(r.text if args.json else render_drift(reply))
    return 0


def cli_health(args: argparse.Namespace) -> int:
    """Exit 0 when /readyz says ready, 1 otherwise; always exactly one line.

    A bad ``TEXTSIEVE_URL`` is a broken configuration, not an unready service: exit 2, like every verb.
    """
    import httpx

    url = service_url(args.url)
    try:
        base = _base(url)
        with httpx.Client(timeout=args.timeout) as client:
            r = client.get(f"{base}/readyz")
    except InputError as exc:
        print(f"not ready: {exc.message}")
        return 1
    except httpx.HTTPError as exc:
        print(f"not ready: cannot reach {url} ({type(exc).__name__})")
        return 1
    ours = True
    try:
        body = r.json()
        reason = one_line(str(body.get("reason", "")))
        ours = isinstance(body.get("ready"), bool)
    except (ValueError, AttributeError):
        ours = False
        reason = ""
    if r.status_code == 200:
        if ours:
            print(f"ready: {reason}")
            return 0
        # Another server answered 200 (a page, other JSON): not a ready textsieve.
        reason = f"HTTP 200 from {base}/readyz is not a textsieve readiness reply; is --url the service?"
    if r.is_redirect:
        reason = _problem_detail(r)
    elif not reason and r.status_code == 404:
        reason = f"HTTP 404 from {base}/readyz: --url is the service's address, e.g. http://127.0.0.1:8000"
    print(f"not ready: {reason or f'HTTP {r.status_code}'}")
    return 1


__all__ = ["cli_drift", "cli_health", "cli_predict", "highlight", "register", "render", "render_drift"]
