"""OpenAPI declarations shared by the routes: responses, form bodies and query parameters.

Handlers read their forms with ``forms.read_form`` and their query strings by hand, so FastAPI cannot see
either; the pieces here describe them in the schema (``openapi_extra``) so that the documentation is true
and the schemathesis fuzz test can generate bodies and parameters. Nothing here runs on a request.
"""

from __future__ import annotations

from typing import Any

from app.web.schemas import ErrorBody, ValidationErrorBody

Responses = dict[int | str, dict[str, Any]]

_TEXT = {"schema": {"type": "string"}}
# a reference, not "model": on an HTML route FastAPI would file a model's schema under text/html; the
# /api routes' own "model": ErrorBody entries put the component in the schema
_ERROR_BODY = {"schema": {"$ref": f"#/components/schemas/{ErrorBody.__name__}"}}


def api_errors(*codes: int) -> Responses:
    """JSON error bodies ``{"error": ...}`` of an /api route."""
    what = {400: "Input the caller can correct", 404: "No such roster, mapping or run",
            409: "The same file was imported before",
            503: "The import's worker process ended before it finished; nothing was stored, try again"}
    return {code: {"model": ErrorBody, "description": what[code]} for code in codes}


def page_errors(*codes: int) -> Responses:
    """Errors of an HTML route: an error page, or ``{"error": ...}`` when the client accepts JSON."""
    what = {400: "Input the analyst can correct", 404: "No such roster, mapping or run"}
    return {code: {"description": f"{what[code]}: an error page, or JSON when the request accepts "
                                  "application/json",
                   "content": {"text/html": _TEXT, "application/json": _ERROR_BODY}} for code in codes}


#: a form handler that shows its page again, with the message, instead of the page it would go to
FORM_AGAIN: Responses = {400: {"description": "The form again (HTML) with what to correct",
                               "content": {"text/html": _TEXT}}}


#: an import whose worker process ended before it finished (nothing stored): the form again with why
WORKER_LOST: Responses = {503: {"description": "The import's worker process ended before it finished; nothing "
                                               "was stored: the form again (HTML) with why",
                                "content": {"text/html": _TEXT}}}


#: the middleware's refusals of a state-changing request (plain text)
GUARDS: Responses = {
    403: {"description": "Refused: the request came from another site (Origin or Referer)",
          "content": {"text/plain": _TEXT}},
    413: {"description": "The body is larger than the upload limit", "content": {"text/plain": _TEXT}},
}


def redirect(to: str, *more: Responses) -> Responses:
    """A form POST that answers 303 See Other, plus the refusals it can give."""
    out: Responses = {303: {"description": f"Done; go to {to}",
                            "headers": {"Location": {"description": "the page to show next",
                                                     "schema": {"type": "string"}}}}}
    for extra in (*more, GUARDS):
        out.update(extra)
    return out


def download(description: str, *media_types: str) -> Responses:
    """A file download (``Content-Disposition: attachment``) in one of ``media_types``."""
    binary = {"schema": {"type": "string", "format": "binary"}}
    return {200: {"description": description, "content": {m: binary for m in media_types},
                  "headers": {"Content-Disposition": {"schema": {"type": "string"}}}}}


def json_or_validation_error(model: type, description: str) -> dict[str, Any]:
    """A 422 that is either the route's own JSON body or FastAPI's validation error of a path parameter."""
    return {"model": model | ValidationErrorBody, "description": description}


# -- request descriptions ----------------------------------------------------------------------------


def form_body(properties: dict[str, Any], *, required: tuple[str, ...] = (), multipart: bool = False,
              pattern_properties: dict[str, Any] | None = None) -> dict[str, Any]:
    """``openapi_extra`` for a form read with ``read_form``."""
    schema: dict[str, Any] = {"type": "object", "properties": properties}
    if required:
        schema["required"] = list(required)
    if pattern_properties:
        schema["patternProperties"] = pattern_properties
    media = "multipart/form-data" if multipart else "application/x-www-form-urlencoded"
    # a form whose every field is optional may be left out altogether (the handler then uses its defaults)
    return {"requestBody": {"required": bool(required), "content": {media: {"schema": schema}}}}


def query(*params: tuple[str, dict[str, Any], str]) -> dict[str, Any]:
    """``openapi_extra`` for query parameters a handler reads from ``request.query_params``."""
    return {"parameters": [{"name": name, "in": "query", "required": False, "schema": schema,
                            "description": text} for name, schema, text in params]}


def merged(*parts: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for part in parts:
        for key, value in part.items():
            out[key] = out.get(key, []) + value if key == "parameters" else value
    return out


FILE = {"type": "string", "format": "binary"}
YEAR = {"type": "integer", "minimum": 0}
WINDOW_QUERY = (("from", YEAR, "first fiscal year of the window"), ("to", YEAR, "last fiscal year"))
