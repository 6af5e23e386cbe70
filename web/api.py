"""The JSON API under ``/api/v1`` (Bearer tokens) and its OpenAPI 3 document.

Every error is JSON: ``{"errors": [{"field" | "file", "line", "column", "message"}]}`` with
400 (bad input), 401 (no or bad token), 403 (role), 404 (no such unit), 422 (valid input
that gives no result: a stage that cannot be solved).
"""

from __future__ import annotations

import json

from flask import Blueprint, Response, g, request

from fitter.errors import InputError
from fitter.service import web_support
from fitter.service.matching import POSITION_RANGE

from .auth import ledger, need

bp = Blueprint("api", __name__, url_prefix="/api/v1")


def _no_result(e, field=None):
    return {"errors": [{"field": getattr(e, "field", field), "message": str(e)}]}, 422


def _body() -> dict:
    data = request.get_json(silent=True)
    if not isinstance(data, dict):
        raise InputError("send a JSON object (Content-Type: application/json)", field="body")
    return data


def _not_found(e: InputError):
    if e.field == "id" and e.message.startswith("no unit"):
        return {"errors": [e.to_dict()]}, 404
    raise e


@bp.route("/measurements", methods=["POST"])
@need("editor")
def measurements():
    files = [(f.filename or "upload.csv", f.read()) for f in request.files.getlist("file") if f]
    res = web_support.import_uploads(ledger(), g.user["name"], files, request.form.get("type", ""),
                                     request.form.get("model", "koren"),
                                     instrument=request.form.get("instrument", "")[:200],
                                     notes=request.form.get("notes", "")[:2000])
    return {"units": res["units"], "files": res["files"], "warnings": res["warnings"]}, 201


@bp.route("/units/<unit_id>", methods=["GET"])
@need("viewer")
def unit(unit_id):
    try:
        return web_support.unit(ledger(), unit_id)
    except InputError as e:
        return _not_found(e)


@bp.route("/units/<unit_id>/card", methods=["GET"])
@need("viewer")
def card(unit_id):
    try:
        return Response(json.dumps(web_support.unit_card(ledger(), unit_id), allow_nan=False),
                        mimetype="application/json")
    except InputError as e:
        return _not_found(e)


@bp.route("/units/<unit_id>/spice", methods=["GET"])
@need("viewer")
def spice(unit_id):
    try:
        name, text = web_support.unit_export(ledger(), unit_id, "spice")
    except InputError as e:
        return _not_found(e)
    resp = Response(text, mimetype="text/plain")
    resp.headers["Content-Disposition"] = f'inline; filename="{name}"'
    return resp


# the range of a test position [V]: the engine's own rule, checked here before any unit is loaded
_POSITION_RANGE = POSITION_RANGE


@bp.route("/match", methods=["POST"])
@need("viewer")
def match():
    b = _body()
    unknown = sorted(set(b) - {"units", "va", "vg", "tolerance", "group"})
    if unknown:
        raise InputError("not a field of a match request (units, va, vg, tolerance, group)", field=unknown[0])
    for k in ("va", "vg"):
        if k not in b:
            raise InputError("required", field=k)
        lo, hi = _POSITION_RANGE[k]
        v = b[k]
        if isinstance(v, (int, float)) and not isinstance(v, bool) and not lo <= v <= hi:
            raise InputError(f"must be between {lo:g} and {hi:g} V, got {v:g}", field=k)
    try:
        return web_support.match_by_id(ledger(), b.get("units"), b["va"], b["vg"], b.get("tolerance", 5.0),
                                       b.get("group", 2))
    except RuntimeError as e:
        return _no_result(e)


@bp.route("/stage", methods=["POST"])
@need("viewer")
def stage():
    b = _body()
    unknown = sorted(set(b) - {"kind", "circuit", "tube", "bottom", "top"})
    if unknown:
        raise InputError("not a field of a stage request (kind, circuit, tube, bottom, top)", field=unknown[0])
    try:
        res = web_support.stage_by_id(ledger(), b.get("kind"), b.get("circuit", {}), b.get("tube"), b.get("bottom"),
                                      b.get("top"))
    except RuntimeError as e:
        return _no_result(e)
    return Response(json.dumps(res.to_dict(), allow_nan=False), mimetype="application/json")


# -- design: output stages and sweeps (fitter.service.web_design) ---------------------------

_OUTPUT_KEYS = ("kind", "circuit", "tube", "tube_a", "tube_b", "thd", "loads", "level", "response")
_SWEEP_KEYS = ("kind", "vary", "start", "stop", "points", "log", "circuit", "tube", "bottom", "top", "tube_a", "tube_b",
               "type", "thd_limit", "level", "slew_vpeak")


def _known(b, keys, what):
    unknown = sorted(set(b) - set(keys))
    if unknown:
        raise InputError(f"not a field of {what} ({', '.join(keys)})", field=unknown[0])


def _json(d):
    return Response(json.dumps(d, allow_nan=False), mimetype="application/json")


@bp.route("/output", methods=["POST"])
@need("viewer")
def output():
    """An output stage with stored units: the figures of 'platebook output KIND --json'."""
    from fitter.service import web_design

    b = _body()
    _known(b, _OUTPUT_KEYS, "an output request")
    if not isinstance(b.get("response", False), bool):
        raise InputError("must be true or false", field="response")
    tubes = {k: b[k] for k in ("tube", "tube_a", "tube_b") if k in b}
    try:
        run = web_design.output_run(ledger(), b.get("kind"), b.get("circuit", {}), tubes, b.get("thd"), b.get("loads"),
                                    b.get("level"), response=b.get("response", False))
    except RuntimeError as e:
        return _no_result(e)
    return _json(run.to_dict())


@bp.route("/sweep", methods=["POST"])
@need("viewer")
def sweep():
    """A design sweep with stored units or a type's stock: the figures of 'platebook sweep KIND --json'."""
    from fitter.service import web_design

    b = _body()
    _known(b, _SWEEP_KEYS, "a sweep request")
    tubes = {k: b[k] for k in ("tube", "bottom", "top", "tube_a", "tube_b") if k in b}
    try:
        sw = web_design.sweep_run(ledger(), b.get("kind"), b.get("vary"), b.get("start"), b.get("stop"),
                                  b.get("points"), b.get("log", False), b.get("circuit", {}), tubes, b.get("type"),
                                  b.get("thd_limit"), b.get("level"), b.get("slew_vpeak"))
    except RuntimeError as e:
        return _no_result(e)
    return _json(sw.to_dict())


@bp.route("/openapi.json", methods=["GET"])
def openapi():
    return OPENAPI


_ERR = {"description": "errors", "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Errors"}}}}
_UNIT_ID = {"name": "id", "in": "path", "required": True, "schema": {"type": "integer", "minimum": 1},
            "description": "a unit id (the id of a stored fit, as POST /measurements returns)"}

# the design endpoints' parts: a value is a number in SI units or text such as "3k"
_VALUE = {"oneOf": [{"type": "number"}, {"type": "string"}]}
_TUBE = {"oneOf": [{"type": "integer", "minimum": 1}, {"type": "string"}],
         "description": "a unit id, or label:section"}
_OUTPUT_CIRCUIT = {
    "type": "object", "required": ["b_plus"], "additionalProperties": False,
    "description": "the stage's fields in SI units (numbers or text like '3k'); give load or turns_ratio, "
                   "grid_bias or rk",
    "properties": {**{k: _VALUE for k in ("b_plus", "load", "turns_ratio", "speaker", "r_primary", "grid_bias", "rk",
                                          "pa_max", "grid_onset", "cgk", "cga", "cak", "rs", "c_in", "rg", "ck",
                                          "l_primary", "l_leak", "c_winding")},
                   "bypassed": {"type": "boolean"}}}

OPENAPI = {
    "openapi": "3.0.3",
    "info": {"title": "Platebook API", "version": "1",
             "description": "Triode units in the stock ledger: upload curve files, fetch model cards and SPICE "
                            "subcircuits, match units, solve stages. CAUTION: tube circuits and curve tracers work "
                            "at lethal voltages; follow your local electrical codes and licensed practice."},
    "servers": [{"url": "/api/v1"}],
    "security": [{"bearer": []}],
    "components": {
        "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer",
                                       "description": "a token from 'platebook users token NAME'"}},
        "schemas": {
            "Errors": {"type": "object", "required": ["errors"], "properties": {"errors": {"type": "array", "items": {
                "type": "object", "required": ["message"], "properties": {
                    "field": {"type": "string", "nullable": True}, "file": {"type": "string", "nullable": True},
                    "line": {"type": "integer", "nullable": True}, "column": {"type": "string", "nullable": True},
                    "message": {"type": "string"}}}}}},
            "Unit": {"type": "object", "required": ["id", "tube", "section", "fit"], "properties": {
                "id": {"type": "integer"}, "tube": {"type": "string"}, "section": {"type": "string", "nullable": True},
                "fit": {"type": "object", "required": ["model", "params", "stderr", "converged", "rms_ma"],
                        "properties": {"model": {"type": "string"},
                                       "params": {"type": "object", "additionalProperties": {"type": "number"}},
                                       "stderr": {"type": "object",
                                                  "additionalProperties": {"type": "number", "nullable": True}},
                                       "converged": {"type": "boolean"},
                                       "failure": {"type": "string", "nullable": True},
                                       "rms_ma": {"type": "number", "nullable": True}}}}},
        },
    },
    "paths": {
        "/measurements": {"post": {
            "summary": "Import one or more curve files (all or nothing) and fit every unit",
            "requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
                "type": "object", "required": ["file", "type"], "properties": {
                    "file": {"type": "array", "items": {"type": "string", "format": "binary"}},
                    "type": {"type": "string", "description": "the tube type (added with 'platebook stock type')"},
                    "model": {"type": "string", "enum": ["power", "koren", "dempwolf"], "default": "koren"},
                    "instrument": {"type": "string"}, "notes": {"type": "string"}}}}}},
            "responses": {"201": {"description": "stored and fitted", "content": {"application/json": {"schema": {
                "type": "object", "properties": {"units": {"type": "array",
                                                           "items": {"$ref": "#/components/schemas/Unit"}},
                                                 "warnings": {"type": "array", "items": {"type": "string"},
                                                              "description": "stored all the same: e.g. the "
                                                              "same measured points as a tube already stored"}}}}}},
                          "400": _ERR, "401": _ERR, "403": _ERR}}},
        "/units/{id}": {"get": {"summary": "A unit and its fit", "parameters": [_UNIT_ID], "responses": {
            "200": {"description": "the unit", "content": {"application/json": {
                "schema": {"$ref": "#/components/schemas/Unit"}}}}, "400": _ERR, "401": _ERR, "404": _ERR}}},
        "/units/{id}/card": {"get": {"summary": "The unit's model card (JSON)", "parameters": [_UNIT_ID],
                                     "responses": {"200": {"description": "the model card", "content": {
                                         "application/json": {"schema": {"type": "object"}}}},
                                         "400": _ERR, "401": _ERR, "404": _ERR}}},
        "/units/{id}/spice": {"get": {"summary": "The unit's SPICE subcircuit", "parameters": [_UNIT_ID],
                                      "responses": {"200": {"description": "subcircuit text", "content": {
                                          "text/plain": {"schema": {"type": "string"}}}},
                                          "400": _ERR, "401": _ERR, "404": _ERR}}},
        "/match": {"post": {
            "summary": "Match units at a fixed-bias position (the same optimum as 'platebook match')",
            "requestBody": {"required": True, "content": {"application/json": {"schema": {
                "type": "object", "required": ["units", "va", "vg"], "additionalProperties": False, "properties": {
                    "units": {"type": "array", "minItems": 1, "uniqueItems": True,
                              "items": {"type": "integer", "minimum": 1, "maximum": 9223372036854775807}},
                    "va": {"type": "number", "minimum": 1, "maximum": 10000,
                           "description": "plate voltage [V]"},
                    "vg": {"type": "number", "minimum": -1000, "maximum": 1000, "description": "grid voltage [V]"},
                    "tolerance": {"type": "number", "default": 5, "description": "[%]"},
                    "group": {"type": "integer", "enum": [2, 4], "default": 2}}}}}},
            "responses": {"200": {"description": "groups and units left over", "content": {"application/json": {
                "schema": {"type": "object", "required": ["groups", "unmatched"], "properties": {
                    "groups": {"type": "array", "items": {"type": "object", "properties": {
                        "units": {"type": "array", "items": {"type": "integer"}},
                        "mismatch": {"type": "object", "properties": {"max_pct": {"type": "number"}}},
                        "grade": {"type": "string"}}}},
                    "unmatched": {"type": "array", "items": {"type": "object"}}}}}}},
                "400": _ERR, "401": _ERR, "422": _ERR}}},
        "/stage": {"post": {
            "summary": "Solve a stage with stored units (the figures of 'platebook stage --json')",
            "requestBody": {"required": True, "content": {"application/json": {"schema": {
                "type": "object", "required": ["kind", "circuit"], "additionalProperties": False, "properties": {
                    "kind": {"type": "string", "enum": ["common-cathode", "cathode-follower", "stack"]},
                    "circuit": {"type": "object", "description": "the circuit's fields in SI units "
                                                                 "(b_plus, ra, rk, ...); numbers or text like '100k'"},
                    "tube": {"type": "integer", "minimum": 1}, "bottom": {"type": "integer", "minimum": 1},
                    "top": {"type": "integer", "minimum": 1}}}}}},
            "responses": {"200": {"description": "the stage's figures", "content": {
                "application/json": {"schema": {"type": "object"}}}}, "400": _ERR, "401": _ERR, "422": _ERR}}},
        # -- design: output stages and sweeps
        "/output": {"post": {
            "summary": "Solve a single-ended or push-pull output stage with stored units (the figures of "
                       "'platebook output KIND --json')",
            "requestBody": {"required": True, "content": {"application/json": {"schema": {
                "type": "object", "required": ["kind", "circuit"], "additionalProperties": False, "properties": {
                    "kind": {"type": "string", "enum": ["single-ended", "push-pull"]},
                    "circuit": _OUTPUT_CIRCUIT,
                    "tube": _TUBE, "tube_a": _TUBE, "tube_b": _TUBE,
                    "thd": {"type": "number", "exclusiveMinimum": True, "minimum": 0, "exclusiveMaximum": True,
                            "maximum": 1, "default": 0.05, "description": "THD (fraction) for the output power"},
                    "loads": {"type": "array", "minItems": 1, "maxItems": 200, "items": _VALUE,
                              "description": "reflected loads [ohm] for a load sweep"},
                    "level": {"type": "number", "default": 1, "description": "output power [W] of the load "
                                                                              "sweep's THD column"},
                    "response": {"type": "boolean", "default": False,
                                 "description": "also the frequency response at the secondary"}}}}}},
            "responses": {"200": {"description": "the stage's figures", "content": {
                "application/json": {"schema": {"type": "object"}}}}, "400": _ERR, "401": _ERR, "422": _ERR}}},
        "/sweep": {"post": {
            "summary": "Sweep one field of a stage over a range, for stored units or a type's in-stock sections "
                       "(the figures of 'platebook sweep KIND --json')",
            "requestBody": {"required": True, "content": {"application/json": {"schema": {
                "type": "object", "required": ["kind", "vary", "start", "stop"], "additionalProperties": False,
                "properties": {
                    "kind": {"type": "string", "enum": ["common-cathode", "cathode-follower", "stack",
                                                        "single-ended", "push-pull"]},
                    "vary": {"type": "string", "description": "the field to sweep (ra, b_plus, load, grid_bias ...)"},
                    "start": _VALUE, "stop": _VALUE,
                    "points": {"type": "integer", "minimum": 2, "maximum": 200, "default": 20},
                    "log": {"type": "boolean", "default": False},
                    "circuit": {"type": "object", "additionalProperties": {"oneOf": [_VALUE, {"type": "boolean"}]},
                                "description": "the stage's other fields in SI units"},
                    "tube": _TUBE, "bottom": _TUBE, "top": _TUBE, "tube_a": _TUBE, "tube_b": _TUBE,
                    "type": {"type": "string", "description": "a tube type: its whole in-stock stock instead of tubes"},
                    "thd_limit": {"type": "number", "exclusiveMinimum": True, "minimum": 0, "exclusiveMaximum": True,
                                  "maximum": 1, "description": "THD (fraction) of the headroom / output power"},
                    "level": {"type": "number", "description": "the THD column's level [V peak; W for an output stage]"},
                    "slew_vpeak": {"type": "number", "description": "output peak of the slew figure [V]"}}}}}},
            "responses": {"200": {"description": "the figures against the swept value", "content": {
                "application/json": {"schema": {"type": "object"}}}}, "400": _ERR, "401": _ERR, "422": _ERR}}},
        "/openapi.json": {"get": {"summary": "This document", "security": [],
                                  "responses": {"200": {"description": "OpenAPI 3"}}}},
    },
}


# -- digitising a datasheet plot (fitter.service.digitise): the page's steps as calls ------------

from fitter.service import digitise as _digi  # noqa: E402


def _plot_call(fn, *a, **kw):
    try:
        return fn(*a, **kw)
    except InputError as e:
        if e.field == "id" and e.message.startswith("no plot"):
            return {"errors": [e.to_dict()]}, 404
        raise


def _fields(b: dict, allowed: tuple) -> dict:
    unknown = sorted(set(b) - set(allowed))
    if unknown:
        raise InputError(f"not a field of this request ({', '.join(allowed)})", field=unknown[0])
    return b


@bp.route("/plots", methods=["POST"])
@need("editor")
def plot_upload():
    files = [f for f in request.files.getlist("file") if f]
    if len(files) != 1:
        raise InputError("send exactly one image (PNG or JPEG) in the field 'file'", field="file")
    return _digi.upload_plot(ledger(), g.user["name"], files[0].filename or "plot", files[0].read()), 201


@bp.route("/plots/<plot_id>", methods=["GET"])
@need("viewer")
def plot_get(plot_id):
    return _plot_call(_digi.plot_info, ledger(), plot_id)


@bp.route("/plots/<plot_id>/image", methods=["GET"])
@need("viewer")
def plot_image(plot_id):
    got = _plot_call(_digi.plot_image, ledger(), plot_id)
    if not isinstance(got[0], bytes):
        return got
    resp = Response(got[0], mimetype=got[1])
    resp.headers["Cache-Control"] = "private, max-age=86400"  # an id's image never changes
    return resp


@bp.route("/plots/<plot_id>/axes", methods=["PUT"])
@need("editor")
def plot_axes(plot_id):
    b = _fields(_body(), ("marks", "box"))
    if "marks" not in b:
        raise InputError("required", field="marks")
    return _plot_call(_digi.set_axes, ledger(), plot_id, b["marks"], b.get("box"))


@bp.route("/plots/<plot_id>/trace", methods=["POST"])
@need("editor")
def plot_trace(plot_id):
    b = _fields(_body(), ("seed", "box", "n"))
    if "seed" not in b:
        raise InputError("required", field="seed")
    return _plot_call(_digi.trace, ledger(), plot_id, b["seed"], b.get("box"), b.get("n", _digi.TRACE_POINTS))


@bp.route("/plots/<plot_id>/curves", methods=["PUT"])
@need("editor")
def plot_curves(plot_id):
    b = _fields(_body(), ("curves",))
    if "curves" not in b:
        raise InputError("required", field="curves")
    return _plot_call(_digi.set_curves, ledger(), plot_id, b["curves"])


@bp.route("/plots/<plot_id>/measurement", methods=["POST"])
@need("editor")
def plot_measurement(plot_id):
    b = _fields(_body(), ("tube", "type", "section", "model"))
    for k in ("tube", "type"):
        if k not in b:
            raise InputError("required", field=k)
    got = _plot_call(_digi.save, ledger(), g.user["name"], plot_id, b["tube"], b["type"], b.get("section", ""),
                     b.get("model", "koren"))
    return got if isinstance(got, tuple) else (got, 201)


_PLOT_ID = {"name": "id", "in": "path", "required": True, "description": "a plot id (as POST /plots returns)",
            "schema": {"type": "integer", "minimum": 1, "maximum": 9223372036854775807}}
_PIXEL = {"type": "array", "minItems": 2, "maxItems": 2, "items": {"type": "number"},
          "description": "[px, py]: image pixel column (x to the right) and row (y downwards)"}
_BOX = {"type": "array", "minItems": 4, "maxItems": 4, "items": {"type": "number"}, "nullable": True,
        "description": "the plot area [x0, y0, x1, y1] in image pixels (null: the whole image)"}
_MARK = {"type": "object", "required": ["px", "py", "axis", "value"], "additionalProperties": False, "properties": {
    "px": {"type": "number"}, "py": {"type": "number"}, "axis": {"type": "string", "enum": ["va", "ia"]},
    "value": {"type": "number", "description": "the tick's value: volts on the va axis, mA on the ia axis"}}}
_CURVE = {"type": "object", "required": ["points"], "additionalProperties": False, "properties": {
    "grid_v": {"type": "number", "nullable": True, "description": "the curve's grid voltage [V]"},
    "points": {"type": "array", "maxItems": _digi.MAX_POINTS, "items": _PIXEL}, "seed": _PIXEL}}
_JSON_OBJ = {"application/json": {"schema": {"type": "object"}}}


def _op(summary, ok, body=None, code="200", desc="done"):
    op = {"summary": summary, "parameters": [_PLOT_ID],
          "responses": {code: {"description": desc, "content": ok}, "400": _ERR, "401": _ERR, "403": _ERR,
                        "404": _ERR}}
    if body is not None:
        op["requestBody"] = {"required": True, "content": {"application/json": {"schema": body}}}
    return op


OPENAPI["paths"].update({
    "/plots": {"post": {
        "summary": "Upload a datasheet plot (PNG or JPEG) to digitise",
        "requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
            "type": "object", "required": ["file"],
            "properties": {"file": {"type": "string", "format": "binary"}}}}}},
        "responses": {"201": {"description": "stored", "content": {"application/json": {"schema": {
            "type": "object", "required": ["id", "width", "height"], "properties": {
                "id": {"type": "integer"}, "width": {"type": "integer"}, "height": {"type": "integer"},
                "name": {"type": "string"}, "format": {"type": "string"}}}}}},
                      "400": _ERR, "401": _ERR, "403": _ERR}}},
    "/plots/{id}": {"get": _op("The plot's facts and its work: marks, axis map with residuals, plot area, curves",
                               _JSON_OBJ)},
    "/plots/{id}/image": {"get": _op("The image as uploaded", {"image/png": {"schema": {"type": "string",
                                                                                       "format": "binary"}},
                                                              "image/jpeg": {"schema": {"type": "string",
                                                                                        "format": "binary"}}})},
    "/plots/{id}/axes": {"put": _op(
        "Step 1 (and 2): store the axis marks (and the plot area); the axis map and each mark's residual [px]",
        _JSON_OBJ, {"type": "object", "required": ["marks"], "additionalProperties": False, "properties": {
            "marks": {"type": "array", "maxItems": _digi.MAX_MARKS, "items": _MARK}, "box": _BOX}})},
    "/plots/{id}/trace": {"post": _op(
        "Step 3: follow the curve through a clicked pixel; its points in pixels and in V / mA (nothing stored)",
        _JSON_OBJ, {"type": "object", "required": ["seed"], "additionalProperties": False, "properties": {
            "seed": _PIXEL, "box": _BOX, "n": {"type": "integer", "minimum": _digi.TRACE_POINTS_RANGE[0],
                                               "maximum": _digi.TRACE_POINTS_RANGE[1], "default": _digi.TRACE_POINTS}}})},
    "/plots/{id}/curves": {"put": _op(
        "Steps 3-4: store the curves (grid voltage, points in pixels, corrected by hand)",
        _JSON_OBJ, {"type": "object", "required": ["curves"], "additionalProperties": False, "properties": {
            "curves": {"type": "array", "maxItems": _digi.MAX_CURVES, "items": _CURVE}}})},
    "/plots/{id}/measurement": {"post": _op(
        "Step 5: save the curves as a measurement of a tube (instrument 'datasheet plot (digitised)') and fit it",
        {"application/json": {"schema": {"type": "object", "required": ["units", "measurement_ids", "failed"],
                                         "properties": {"units": {"type": "array",
                                                                  "items": {"$ref": "#/components/schemas/Unit"}},
                                                        "measurement_ids": {"type": "array",
                                                                            "items": {"type": "integer"}},
                                                        "failed": {"type": "boolean"},
                                                        "overlay": {"type": "array", "items": {"type": "object"}}}}}},
        {"type": "object", "required": ["tube", "type"], "additionalProperties": False, "properties": {
            "tube": {"type": "string", "description": "the tube's label (a known label adds a re-test)"},
            "type": {"type": "string", "description": "the tube type (added with 'platebook stock type')"},
            "section": {"type": "string", "default": ""},
            "model": {"type": "string", "enum": ["power", "koren", "dempwolf"], "default": "koren"}}},
        code="201", desc="stored and fitted (a failed fit is stored and reported with failed: true)")},
})
