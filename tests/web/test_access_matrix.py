"""Who gets what: every page, API endpoint, file download and search, for every role.

One table, ``MATRIX``: a row is an object type, a verb, a method, a URL (a
template filled from the world's ids) and a request body, then the exact
outcome for each of the five callers:

    lead      team lead of "Bench" (the ``team`` of tests/conftest.py)
    engineer  engineer of Bench
    viewer    viewer of Bench (reads only)
    outsider  lead of "Far" (``other_team``): a member of another team, with
              every right there, asking for Bench's objects
    anonymous nobody signed in

Outcomes (see ``Out``): ``OK`` 200; ``DONE``/``MADE``/``CHANGED``/``GONE_204``
an accepted write (its status, and the database did change); ``NO`` 403,
``GONE`` 404 (another team's object is missing, never forbidden: its
existence is not revealed), ``LOGIN`` a redirect to the sign-in page,
``ANON`` 401 (the API's token authentication comes first, so a request with
no credentials is 401 with ``WWW-Authenticate: Token``), ``BAD`` 400 (the API
refuses a reference to another team's object as "not in your teams", the same
words as for an id that does not exist), ``SAME``/``STAYS`` a form shown again
or a redirect back with the reason, nothing done. Every refusal also asserts
that nothing in the database (and no stored upload) changed. ``MINE``/
``THEIRS``: a list or page that shows exactly the caller's team's objects
(``EMPTY``: none at all); ``FILE``: the stored upload, byte for byte, as an
attachment; ``hits(...)``: the search results, by case, a shared case without
a link to its page.

The world (two teams, one of every object each, scans and captures analysed
in-process by the services, no worker) is built once for the module; each
test runs in its own savepoint, so a write never leaks into the next test.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from django.apps import apps
from django.contrib.auth import get_user_model
from django.core.files.uploadedfile import SimpleUploadedFile
from django.db import connection, transaction
from django.test import Client, override_settings
from rest_framework.test import APIClient

from emicase import models as m
from emicase.services import analysis as analysis_svc
from emicase.services import cases as case_svc
from emicase.services import countermeasures as cm_svc
from emicase.services.uploads import capture_upload, scan_upload
from tests.web.traces import receiver_csv

ROLES = ("lead", "engineer", "viewer", "outsider", "anonymous")
MHZ = 1e6
# CISPR 32 Table A.4 via /work/shared/DOMAIN.md: class B at 10 m, 30 dBµV/m below 230 MHz.
LIMIT = 30.0
QUERY = "48 MHz, 96 MHz, 144 MHz"  # a 48 MHz clock and its 2nd and 3rd harmonics


# ----------------------------------------------------------------- outcomes


@dataclass(frozen=True)
class Out:
    status: int
    login: bool = False  # a redirect to the sign-in page
    # True: the write happened; False: nothing changed; None: not checked.
    changed: bool | None = None
    # "mine"/"theirs" for lists and pages; the cases found for searches.
    sees: str | frozenset | None = None
    attachment: bool = False  # the stored upload, as a download

    def __repr__(self) -> str:
        return TOKEN_NAMES.get(self, f"Out({self.status})")


OK = Out(200)
DONE = Out(302, changed=True)  # a page's write: done, then a redirect
MADE = Out(201, changed=True)
CHANGED = Out(200, changed=True)  # an API action's write
GONE_204 = Out(204, changed=True)  # deleted
SAME = Out(200, changed=False)  # the form is shown again with its error; nothing stored
STAYS = Out(302, changed=False)  # back to the page with a message saying why; nothing changed
NO = Out(403, changed=False)
GONE = Out(404, changed=False)
BAD = Out(400, changed=False)
ANON = Out(401, changed=False)
LOGIN = Out(302, login=True, changed=False)
MINE = Out(200, sees="mine")
THEIRS = Out(200, sees="theirs")
EMPTY = Out(200, sees="nothing")  # a list with no rows at all
FILE = Out(200, attachment=True)
TOKEN_NAMES = {v: k for k, v in dict(globals()).items() if isinstance(v, Out)}


def hits(*keys: str) -> Out:
    """A search answered with exactly these cases (keys of ``World.case_keys``)."""
    return Out(200, sees=frozenset(keys))


# Our team's cases, the other team's, and what each side finds for QUERY.
OURS = hits("case", "closed")
FARS = hits("far_case", "far_closed")


@dataclass(frozen=True)
class Row:
    thing: str
    verb: str
    method: str
    url: str
    body: str | None
    expect: dict
    api: bool
    given: str = ""  # a change made before the request: "we_share", "far_shares"

    @property
    def id(self) -> str:
        return f"{self.thing}:{self.verb}"


def R(thing, verb, method, url, body, lead, engineer, viewer, outsider, anonymous, **kw) -> Row:
    return Row(
        thing=thing,
        verb=verb,
        method=method,
        url=url,
        body=body,
        api=url.startswith("/api/"),
        expect=dict(zip(ROLES, (lead, engineer, viewer, outsider, anonymous), strict=True)),
        **kw,
    )


# ----------------------------------------------------------------- the matrix
#
# URL templates take the world's ids ({case}, {scan}, {team_slug}, ...: our
# team's objects). Bodies are named in BODIES below.

# fmt: off
MATRIX = [
    # thing             verb                   method    url                                          body            lead     engineer viewer   outsider anonymous
    # --- pages: team, members, audit
    R("team",           "home page",           "get",    "/",                                         None,           MINE,    MINE,    MINE,    THEIRS,  LOGIN),
    R("team",           "settings page",       "get",    "/teams/{team_slug}/settings/",              None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("team",           "settings change",     "post",   "/teams/{team_slug}/settings/",              "settings",     DONE,    NO,      NO,      GONE,    LOGIN),
    R("team",           "share closed cases",  "post",   "/teams/{team_slug}/settings/",              "share",        DONE,    NO,      NO,      GONE,    LOGIN),
    R("team",           "members page",        "get",    "/teams/{team_slug}/members/",               None,           OK,      NO,      NO,      GONE,    LOGIN),
    R("team",           "member add",          "post",   "/teams/{team_slug}/members/",               "member_add",   DONE,    NO,      NO,      GONE,    LOGIN),
    R("team",           "member role",         "post",   "/teams/{team_slug}/members/",               "member_role",  DONE,    NO,      NO,      GONE,    LOGIN),
    R("team",           "member remove",       "post",   "/teams/{team_slug}/members/",               "member_remove", DONE,   NO,      NO,      GONE,    LOGIN),
    # A lead of Far cannot reach our membership through Far's own page either.
    R("team",           "member role via Far", "post",   "/teams/{far_team_slug}/members/",           "member_role",  GONE,    GONE,    GONE,    GONE,    LOGIN),
    R("team",           "audit page",          "get",    "/teams/{team_slug}/audit/",                 None,           OK,      NO,      NO,      GONE,    LOGIN),
    # --- pages: products, revisions, known emission sources
    R("product",        "list page",           "get",    "/products/",                                None,           MINE,    MINE,    MINE,    THEIRS,  LOGIN),
    # A team the caller cannot write in is refused alike whether it exists or not: nothing leaks.
    R("product",        "create",              "post",   "/products/",                                "product",      DONE,    DONE,    NO,      NO,      LOGIN),
    R("product",        "create, no such team", "post",  "/products/",                                "no_team",      NO,      NO,      NO,      NO,      LOGIN),
    R("product",        "page",                "get",    "/products/{product}/",                      None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("revision",       "create",              "post",   "/products/{product}/",                      "revision",     DONE,    DONE,    NO,      GONE,    LOGIN),
    R("revision",       "page",                "get",    "/revisions/{revision}/",                    None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("source",         "create",              "post",   "/revisions/{revision}/",                    "source",       DONE,    DONE,    NO,      GONE,    LOGIN),
    R("source",         "edit page",           "get",    "/sources/{source}/edit/",                   None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("source",         "edit",                "post",   "/sources/{source}/edit/",                   "source",       DONE,    DONE,    NO,      GONE,    LOGIN),
    R("source",         "delete",              "post",   "/sources/{source}/delete/",                 None,           DONE,    DONE,    NO,      GONE,    LOGIN),
    # --- pages: scans and captures, and their stored files
    R("scan",           "log-a-fail page",     "get",    "/log-a-fail/",                              None,           MINE,    MINE,    NO,      THEIRS,  LOGIN),
    # Our revision is not among the outsider's choices: the form says so and stores nothing.
    R("scan",           "log a fail",          "post",   "/log-a-fail/",                              "log_fail",     DONE,    DONE,    NO,      SAME,    LOGIN),
    R("scan",           "page",                "get",    "/scans/{scan}/",                            None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("scan",           "status",              "get",    "/scans/{scan}/status/",                     None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("scan",           "upload page",         "get",    "/cases/{case}/scans/new/",                  None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("scan",           "upload",              "post",   "/cases/{case}/scans/new/",                  "scan_form",    DONE,    DONE,    NO,      GONE,    LOGIN),
    R("scan",           "file download",       "get",    "/scans/{scan}/file/",                       None,           FILE,    FILE,    FILE,    GONE,    LOGIN),
    # No public route to uploads: MEDIA_URL is not served (DEBUG is off here, as in production).
    R("scan",           "file by MEDIA_URL",   "get",    "/media/{scan_path}",                        None,           GONE,    GONE,    GONE,    GONE,    GONE),
    R("capture",        "upload page",         "get",    "/cases/{case}/captures/new/",               None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("capture",        "upload",              "post",   "/cases/{case}/captures/new/",               "capture_form", DONE,    DONE,    NO,      GONE,    LOGIN),
    R("capture",        "page",                "get",    "/captures/{capture}/",                      None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("capture",        "file download",       "get",    "/captures/{capture}/file/",                 None,           FILE,    FILE,    FILE,    GONE,    LOGIN),
    R("capture",        "file by MEDIA_URL",   "get",    "/media/{capture_path}",                     None,           GONE,    GONE,    GONE,    GONE,    GONE),
    # --- pages: the case and what acts on it
    R("case",           "page",                "get",    "/cases/{case}/",                            None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("case",           "live status",         "get",    "/cases/{case}/live/",                       None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("case",           "report",              "get",    "/cases/{case}/report/",                     None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("case",           "report CSV",          "get",    "/cases/{case}/report.csv",                  None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("case",           "locate page",         "get",    "/cases/{case}/locate/",                     None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("case",           "move",                "post",   "/cases/{case}/move/",                       "move",         DONE,    DONE,    NO,      GONE,    LOGIN),
    # Closing is the lead's: moving by hand never gets there, nor out of it (the page says why).
    R("case",           "move to closed",      "post",   "/cases/{case}/move/",                       "move_closed",  STAYS,   STAYS,   NO,      GONE,    LOGIN),
    R("case",           "move a closed case",  "post",   "/cases/{closed}/move/",                     "move",         STAYS,   STAYS,   NO,      GONE,    LOGIN),
    R("case",           "close page",          "get",    "/cases/{case}/close/",                      None,           OK,      NO,      NO,      GONE,    LOGIN),
    R("case",           "close (waive)",       "post",   "/cases/{case}/close/",                      "waive",        DONE,    NO,      NO,      GONE,    LOGIN),
    R("case",           "close (fixed)",       "post",   "/cases/{case}/close/",                      "close_fixed",  DONE,    NO,      NO,      GONE,    LOGIN),
    R("case",           "reopen",              "post",   "/cases/{closed}/reopen/",                   "reopen",       DONE,    NO,      NO,      GONE,    LOGIN),
    R("comment",        "add",                 "post",   "/cases/{case}/comment/",                    "comment",      DONE,    DONE,    NO,      GONE,    LOGIN),
    # --- pages: failing frequencies
    R("failing freq",   "confirm",             "post",   "/cases/{case}/frequencies/confirm/",        "confirm",      DONE,    DONE,    NO,      GONE,    LOGIN),
    R("failing freq",   "add page",            "get",    "/cases/{case}/frequencies/new/",            None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("failing freq",   "add",                 "post",   "/cases/{case}/frequencies/new/",            "ff_form",      DONE,    DONE,    NO,      GONE,    LOGIN),
    R("failing freq",   "edit page",           "get",    "/frequencies/{ff}/edit/",                   None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("failing freq",   "edit",                "post",   "/frequencies/{ff}/edit/",                   "ff_form",      DONE,    DONE,    NO,      GONE,    LOGIN),
    # --- pages: countermeasures and verifications
    R("countermeasure", "propose page",        "get",    "/cases/{case}/fixes/new/",                  None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("countermeasure", "propose",             "post",   "/cases/{case}/fixes/new/",                  "fix_form",     DONE,    DONE,    NO,      GONE,    LOGIN),
    R("countermeasure", "page",                "get",    "/fixes/{cm}/",                              None,           OK,      OK,      OK,      GONE,    LOGIN),
    R("countermeasure", "trial",               "post",   "/fixes/{cm}/trial/",                        None,           DONE,    DONE,    NO,      GONE,    LOGIN),
    R("countermeasure", "reject",              "post",   "/fixes/{cm}/reject/",                       "reason",       DONE,    DONE,    NO,      GONE,    LOGIN),
    R("verification",   "verify",              "post",   "/fixes/{cm}/verify/",                       "verify",       DONE,    DONE,    NO,      GONE,    LOGIN),
    R("verification",   "after-scan page",     "get",    "/fixes/{cm}/after-scan/",                   None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("verification",   "after-scan",          "post",   "/fixes/{cm}/after-scan/",                   "after_scan",   DONE,    DONE,    NO,      GONE,    LOGIN),
    R("verification",   "after-capture page",  "get",    "/fixes/{cm}/after-capture/",                None,           OK,      OK,      NO,      GONE,    LOGIN),
    R("verification",   "after-capture",       "post",   "/fixes/{cm}/after-capture/",                "capture_form", DONE,    DONE,    NO,      GONE,    LOGIN),
    R("verification",   "estimate",            "post",   "/fixes/{cm}/estimate/",                     None,           DONE,    DONE,    NO,      GONE,    LOGIN),
    # --- pages: the signature search
    R("search",         "typed",               "get",    "/similar-problems/?frequencies=" + QUERY,   None,           OURS,    OURS,    OURS,    FARS,    LOGIN),
    R("search",         "by trace",            "post",   "/similar-problems/",                        "trace",        OURS,    OURS,    OURS,    FARS,    LOGIN),
    R("search",         "like this case",      "get",    "/cases/{case}/similar-problems/",           None,           hits("closed"), hits("closed"), hits("closed"), GONE, LOGIN),
    # Sharing lets the other team find our closed cases (never an open one) ...
    R("search",         "typed, we share",     "get",    "/similar-problems/?frequencies=" + QUERY,   None,           OURS,    OURS,    OURS,    hits("far_case", "far_closed", "closed"), LOGIN, given="we_share"),
    # ... and its page, its files, its timeline and searching by it stay 404 to them.
    R("case",           "page, we share",      "get",    "/cases/{closed}/",                          None,           OK,      OK,      OK,      GONE,    LOGIN, given="we_share"),
    R("case",           "reopen, we share",    "post",   "/cases/{closed}/reopen/",                   "reopen",       DONE,    NO,      NO,      GONE,    LOGIN, given="we_share"),
    R("case",           "API detail, we share", "get",   "/api/cases/{closed}/",                      None,           OK,      OK,      OK,      GONE,    ANON,  given="we_share"),
    R("comment",        "API timeline, we share", "get", "/api/cases/{closed}/timeline/",             None,           OK,      OK,      OK,      GONE,    ANON,  given="we_share"),
    R("scan",           "file, we share",      "get",    "/scans/{closed_scan}/file/",                None,           FILE,    FILE,    FILE,    GONE,    LOGIN, given="we_share"),
    R("scan",           "API file, we share",  "get",    "/api/scans/{closed_scan}/file/",            None,           FILE,    FILE,    FILE,    GONE,    ANON,  given="we_share"),
    R("search",         "like it, we share",   "get",    "/cases/{closed}/similar-problems/",         None,           hits("case"), hits("case"), hits("case"), GONE, LOGIN, given="we_share"),
    R("search",         "API by it, we share", "get",    "/api/similar-problems/?case={closed}",      None,           hits("case"), hits("case"), hits("case"), GONE, ANON, given="we_share"),
    # The same from our side: Far's shared case is found, but is not ours to search by.
    R("search",         "API by Far's, Far shares", "get", "/api/similar-problems/?case={far_closed}", None,          GONE,    GONE,    GONE,    hits("far_case"), ANON, given="far_shares"),
    R("search",         "typed, Far shares",   "get",    "/similar-problems/?frequencies=" + QUERY,   None,           hits("case", "closed", "far_closed"), hits("case", "closed", "far_closed"), hits("case", "closed", "far_closed"), FARS, LOGIN, given="far_shares"),
    R("search",         "like this case, Far shares", "get", "/cases/{case}/similar-problems/",       None,           hits("closed", "far_closed"), hits("closed", "far_closed"), hits("closed", "far_closed"), GONE, LOGIN, given="far_shares"),

    # --- API: teams and reference data
    R("team",           "API list",            "get",    "/api/teams/",                               None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("team",           "API detail",          "get",    "/api/teams/{team}/",                        None,           OK,      OK,      OK,      GONE,    ANON),
    R("team",           "API audit log",       "get",    "/api/audit/",                               None,           MINE,    EMPTY,   EMPTY,   THEIRS,  ANON),
    R("limits",         "API list",            "get",    "/api/limits/",                              None,           OK,      OK,      OK,      OK,      ANON),
    # --- API: products, revisions, sources
    R("product",        "API list",            "get",    "/api/products/",                            None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("product",        "API detail",          "get",    "/api/products/{product}/",                  None,           OK,      OK,      OK,      GONE,    ANON),
    R("product",        "API create",          "post",   "/api/products/",                            "api_product",  MADE,    MADE,    NO,      BAD,     ANON),
    R("revision",       "API list",            "get",    "/api/revisions/",                           None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("revision",       "API detail",          "get",    "/api/revisions/{revision}/",                None,           OK,      OK,      OK,      GONE,    ANON),
    R("revision",       "API create",          "post",   "/api/revisions/",                           "api_revision", MADE,    MADE,    NO,      BAD,     ANON),
    R("source",         "API list",            "get",    "/api/sources/",                             None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("source",         "API detail",          "get",    "/api/sources/{source}/",                    None,           OK,      OK,      OK,      GONE,    ANON),
    R("source",         "API create",          "post",   "/api/sources/",                             "api_source",   MADE,    MADE,    NO,      BAD,     ANON),
    R("source",         "API change",          "patch",  "/api/sources/{source}/",                    "api_tolerance", CHANGED, CHANGED, NO,     GONE,    ANON),
    R("source",         "API delete",          "delete", "/api/sources/{source}/",                    None,           GONE_204, GONE_204, NO,   GONE,    ANON),
    # --- API: cases, their actions, timeline and comments
    R("case",           "API list",            "get",    "/api/cases/",                               None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("case",           "API detail",          "get",    "/api/cases/{case}/",                        None,           OK,      OK,      OK,      GONE,    ANON),
    R("case",           "API open",            "post",   "/api/cases/",                               "api_case",     MADE,    MADE,    NO,      BAD,     ANON),
    R("case",           "API move",            "post",   "/api/cases/{case}/move/",                   "move",         CHANGED, CHANGED, NO,     GONE,    ANON),
    R("case",           "API close (waive)",   "post",   "/api/cases/{case}/close/",                  "waive",        CHANGED, NO,      NO,      GONE,    ANON),
    R("case",           "API close (fixed)",   "post",   "/api/cases/{case}/close/",                  "close_fixed",  CHANGED, NO,      NO,      GONE,    ANON),
    R("case",           "API move to closed",  "post",   "/api/cases/{case}/move/",                   "move_closed",  BAD,     BAD,     NO,      GONE,    ANON),
    R("case",           "API move a closed case", "post", "/api/cases/{closed}/move/",                "move",         BAD,     BAD,     NO,      GONE,    ANON),
    R("case",           "API reopen",          "post",   "/api/cases/{closed}/reopen/",               "reopen",       CHANGED, NO,      NO,      GONE,    ANON),
    R("failing freq",   "API confirm",         "post",   "/api/cases/{case}/confirm-frequencies/",    "confirm",      CHANGED, CHANGED, NO,     GONE,    ANON),
    R("comment",        "API timeline",        "get",    "/api/cases/{case}/timeline/",               None,           OK,      OK,      OK,      GONE,    ANON),
    R("comment",        "API list",            "get",    "/api/cases/{case}/comments/",               None,           OK,      OK,      OK,      GONE,    ANON),
    R("comment",        "API add",             "post",   "/api/cases/{case}/comments/",               "comment",      MADE,    MADE,    NO,      GONE,    ANON),
    # --- API: failing frequencies
    R("failing freq",   "API list",            "get",    "/api/failing-frequencies/",                 None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("failing freq",   "API detail",          "get",    "/api/failing-frequencies/{ff}/",            None,           OK,      OK,      OK,      GONE,    ANON),
    R("failing freq",   "API add",             "post",   "/api/failing-frequencies/",                 "api_ff",       MADE,    MADE,    NO,      BAD,     ANON),
    R("failing freq",   "API change",          "patch",  "/api/failing-frequencies/{ff}/",            "api_ff_close", CHANGED, CHANGED, NO,     GONE,    ANON),
    # --- API: scans and captures, their envelopes and files
    R("scan",           "API list",            "get",    "/api/scans/",                               None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("scan",           "API detail",          "get",    "/api/scans/{scan}/",                        None,           OK,      OK,      OK,      GONE,    ANON),
    R("scan",           "API envelope",        "get",    "/api/scans/{scan}/envelope/",               None,           OK,      OK,      OK,      GONE,    ANON),
    R("scan",           "API upload",          "post",   "/api/scans/",                               "api_scan",     MADE,    MADE,    NO,      BAD,     ANON),
    R("scan",           "API file download",   "get",    "/api/scans/{scan}/file/",                   None,           FILE,    FILE,    FILE,    GONE,    ANON),
    R("capture",        "API list",            "get",    "/api/captures/",                            None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("capture",        "API detail",          "get",    "/api/captures/{capture}/",                  None,           OK,      OK,      OK,      GONE,    ANON),
    R("capture",        "API envelope",        "get",    "/api/captures/{capture}/envelope/",         None,           OK,      OK,      OK,      GONE,    ANON),
    R("capture",        "API upload",          "post",   "/api/captures/",                            "api_capture",  MADE,    MADE,    NO,      BAD,     ANON),
    R("capture",        "API file download",   "get",    "/api/captures/{capture}/file/",             None,           FILE,    FILE,    FILE,    GONE,    ANON),
    # --- API: countermeasures and verifications
    R("countermeasure", "API list",            "get",    "/api/countermeasures/",                     None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("countermeasure", "API detail",          "get",    "/api/countermeasures/{cm}/",                None,           OK,      OK,      OK,      GONE,    ANON),
    R("countermeasure", "API propose",         "post",   "/api/countermeasures/",                     "api_cm",       MADE,    MADE,    NO,      BAD,     ANON),
    R("countermeasure", "API trial",           "post",   "/api/countermeasures/{cm}/trial/",          None,           CHANGED, CHANGED, NO,     GONE,    ANON),
    R("countermeasure", "API reject",          "post",   "/api/countermeasures/{cm}/reject/",         "reason",       CHANGED, CHANGED, NO,     GONE,    ANON),
    R("verification",   "API verify",          "post",   "/api/countermeasures/{cm}/verify/",         "verify",       CHANGED, CHANGED, NO,     GONE,    ANON),
    R("verification",   "API list",            "get",    "/api/verifications/",                       None,           MINE,    MINE,    MINE,    THEIRS,  ANON),
    R("verification",   "API detail",          "get",    "/api/verifications/{verification}/",        None,           OK,      OK,      OK,      GONE,    ANON),
    R("verification",   "API record levels",   "post",   "/api/verifications/",                       "api_levels",   MADE,    MADE,    NO,      BAD,     ANON),
    R("verification",   "API after-scan",      "post",   "/api/verifications/after-scan/",            "api_after_scan", MADE,  MADE,    NO,      BAD,     ANON),
    # --- API: the signature search
    R("search",         "API typed",           "get",    "/api/similar-problems/?frequencies=" + QUERY, None,         OURS,    OURS,    OURS,    FARS,    ANON),
    R("search",         "API by case",         "get",    "/api/similar-problems/?case={case}",        None,           hits("closed"), hits("closed"), hits("closed"), GONE, ANON),
    R("search",         "API by trace",        "post",   "/api/similar-problems/",                    "trace",        OURS,    OURS,    OURS,    FARS,    ANON),
    R("search",         "API typed, we share", "get",    "/api/similar-problems/?frequencies=" + QUERY, None,         OURS,    OURS,    OURS,    hits("far_case", "far_closed", "closed"), ANON, given="we_share"),
    R("search",         "API typed, Far shares", "get",  "/api/similar-problems/?frequencies=" + QUERY, None,         hits("case", "closed", "far_closed"), hits("case", "closed", "far_closed"), hits("case", "closed", "far_closed"), FARS, ANON, given="far_shares"),
]
# fmt: on


# ----------------------------------------------------------------- request bodies

SCAN_FIELDS = {
    "emission_kind": "radiated",
    "limit_id": "cispr32-b-rad-10m",
    "detector": "quasi-peak",
    "distance_m": "10",
    "polarisation": "vertical",
    "setting": "pre",
    "lab": "Bench room",
    "measured_on": "2026-11-03",
}


def trace(name: str, tones=((48 * MHZ, 36.0), (96 * MHZ, 35.0), (144 * MHZ, 34.0)), **kw):
    """A small receiver export (401 points) with the clock's first three harmonics over the limit."""
    return SimpleUploadedFile(
        name, receiver_csv(list(tones), points=401, **kw), content_type="text/csv"
    )


def probe_trace(name: str):
    return trace(name, tones=((48.1 * MHZ, 52.0),), unit="dBµV", floor=5.0)


CAPTURE_FIELDS = {
    "declared_domain": "auto",
    "probe_kind": "h_field",
    "tip": "loop 10 mm",
    "board_side": "top",
    "location": "U4 PHY",
}

BODIES = {
    "settings": lambda w: {"guard_band_db": "6", "frequency_tolerance_pct": "0.5"},
    # Only the sharing changes: the other two are the team's current values.
    "share": lambda w: {
        "guard_band_db": "3",
        "frequency_tolerance_pct": "0.5",
        "share_closed_cases": "on",
    },
    "member_add": lambda w: {"action": "add", "username": "newcomer", "role": "engineer"},
    "member_role": lambda w: {
        "action": "role",
        "membership": w.ids["viewer_membership"],
        "role": "engineer",
    },
    "member_remove": lambda w: {
        "action": "remove",
        "membership": w.ids["viewer_membership"],
        "confirmed": "yes",
    },
    "product": lambda w: {"team": w.ids["team"], "name": "Valve node", "description": ""},
    "no_team": lambda w: {"team": 2**40, "name": "Valve node", "description": ""},
    "revision": lambda w: {"hardware_label": "B", "firmware_label": "", "notes": ""},
    "source": lambda w: {
        "name": "Buck U7",
        "kind": "switching",
        "nominal_mhz": "2.2",
        "tolerance": "5 %",
    },
    "log_fail": lambda w: {
        "title": "Another fail",
        "revision": w.ids["revision"],
        **SCAN_FIELDS,
        "file": trace("logged.csv"),
    },
    "scan_form": lambda w: {"revision": w.ids["revision"], **SCAN_FIELDS, "file": trace("s2.csv")},
    "after_scan": lambda w: {**SCAN_FIELDS, "file": trace("after.csv")},
    "capture_form": lambda w: {
        "revision": w.ids["revision"],
        **CAPTURE_FIELDS,
        "file": probe_trace("c2.csv"),
    },
    "move": lambda w: {"to": "hunting"},
    "move_closed": lambda w: {"to": "closed"},
    "waive": lambda w: {"closure": "waived", "reason": "Accepted by the customer for the pilot"},
    "close_fixed": lambda w: {"closure": "fixed", "countermeasure": w.ids["verified_cm"]},
    "reopen": lambda w: {"reason": "The test house disagrees"},
    "comment": lambda w: {"text": "Seen on the second board too"},
    "confirm": lambda w: {"keep": [w.ids["proposal"]]},
    "ff_form": lambda w: {"frequency_mhz": "144", "level": "34", "limit_level": "30"},
    "fix_form": lambda w: {
        "kind": "filtering",
        "description": "100 pF at the connector",
        "revision": w.ids["revision"],
    },
    "reason": lambda w: {"reason": "No change at 48 MHz"},
    "verify": lambda w: {"verification": w.ids["verification"], "reason": "Accepted in review"},
    "trace": lambda w: {"trace": trace("query.csv")},
    "api_product": lambda w: {"team": w.ids["team"], "name": "Valve node"},
    "api_revision": lambda w: {"product": w.ids["product"], "hardware_label": "B"},
    "api_source": lambda w: {
        "revision": w.ids["revision"],
        "name": "Buck U7",
        "nominal_frequency_hz": 2.2e6,
        "tolerance_hz": 1e4,
    },
    "api_tolerance": lambda w: {"tolerance_hz": 10},
    "api_case": lambda w: {"product": w.ids["product"], "title": "Conducted fail"},
    "api_ff": lambda w: {
        "case": w.ids["case"],
        "frequency_hz": 125e6,
        "level": 33,
        "limit_level": 30,
    },
    "api_ff_close": lambda w: {"is_open": False},
    "api_scan": lambda w: {"revision": w.ids["revision"], **SCAN_FIELDS, "file": trace("api.csv")},
    "api_capture": lambda w: {
        "case": w.ids["case"],
        **CAPTURE_FIELDS,
        "file": probe_trace("api-nf.csv"),
    },
    "api_cm": lambda w: {
        "case": w.ids["case"],
        "revision": w.ids["revision"],
        "kind": "filtering",
        "description": "100 pF at the connector",
    },
    "api_levels": lambda w: {
        "countermeasure": w.ids["cm"],
        "levels_after": [{"failing_frequency": w.ids["ff"], "level_after": 25}],
    },
    "api_after_scan": lambda w: {
        "countermeasure": w.ids["cm"],
        **SCAN_FIELDS,
        "file": trace("a.csv"),
    },
}

MULTIPART = {"api_scan", "api_capture", "api_after_scan", "trace"}


# ----------------------------------------------------------------- the world


@dataclass
class World:
    users: dict
    ids: dict = field(default_factory=dict)  # URL template values (our team's objects)
    case_keys: dict = field(default_factory=dict)  # case id → key used by hits()
    mine: dict = field(default_factory=dict)  # list key → ids of our team's rows
    theirs: dict = field(default_factory=dict)
    # "mine"/"theirs" → words only that team's pages show.
    markers: dict = field(default_factory=dict)
    media: Path = Path()  # MEDIA_ROOT of the module


def _analysed(model, pk: int) -> None:
    run = analysis_svc.analyse_scan if model is m.Scan else analysis_svc.analyse_capture
    assert run(pk) == "done", model.objects.get(pk=pk).error_text


def _build_team(team, lead, writer, name: str) -> dict:
    """One of every object for ``team``, through the services, analysed in-process."""
    product = m.Product.objects.create(team=team, name=f"{name} controller")
    revision = m.Revision.objects.create(product=product, hardware_label="A", firmware_label="1.0")
    source = m.EmissionSource.objects.create(
        revision=revision,
        name="PHY clock",
        kind="clock",
        nominal_frequency_hz=25e6,
        tolerance_hz=1250,
    )
    case = case_svc.case_open(product=product, title=f"{name} open case", by=writer)
    ff = m.FailingFrequency.objects.create(
        case=case, frequency_hz=48 * MHZ, level=36.0, limit_level=LIMIT, confirmed=True
    )
    proposal = m.FailingFrequency.objects.create(
        case=case, frequency_hz=96 * MHZ, level=35.0, limit_level=LIMIT, confirmed=False
    )
    scan = scan_upload(
        revision=revision,
        file=trace(f"{name}-scan.csv"),
        by=writer,
        case=case,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10.0,
        measured_on=dt.date(2026, 11, 3),
    )
    _analysed(m.Scan, scan.pk)
    capture = capture_upload(
        case=case,
        file=probe_trace(f"{name}-nf.csv"),
        by=writer,
        revision=revision,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4 PHY",
    )
    _analysed(m.Capture, capture.pk)
    cm = cm_svc.countermeasure_propose(
        case=case, by=writer, kind="ferrite", description="CM choke", revision=revision
    )
    verification = cm_svc.verification_record_levels(
        countermeasure=cm, by=writer, levels_after={ff.pk: 24.0}
    )
    # The same spot after the change, so the near-field estimate has a pair to work from.
    after = capture_upload(
        case=case,
        file=trace(f"{name}-after.csv", tones=((48.1 * MHZ, 40.0),), unit="dBµV", floor=5.0),
        by=writer,
        revision=revision,
        countermeasure=cm,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4 PHY",
    )
    _analysed(m.Capture, after.pk)
    # A second change, verified by hand (the case moves to "Fix proven"): closing as fixed names it.
    shield = cm_svc.countermeasure_propose(
        case=case, by=writer, kind="shielding", description="Shield can", revision=revision
    )
    checked = cm_svc.verification_record_levels(
        countermeasure=shield, by=writer, levels_after={ff.pk: 22.0}
    )
    cm_svc.countermeasure_verify(countermeasure=shield, verification=checked, by=writer)
    case_svc.comment_add(case=case, by=writer, text="Hot spot near the PHY")
    closed = case_svc.case_open(product=product, title=f"{name} closed case", by=writer)
    closed_scan = scan_upload(
        revision=revision,
        file=trace(f"{name}-closed.csv", seed=1),
        by=writer,
        case=closed,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10.0,
        measured_on=dt.date(2025, 6, 2),
    )
    _analysed(m.Scan, closed_scan.pk)
    for f, level in ((48, 36.0), (96, 35.0), (144, 34.0)):
        m.FailingFrequency.objects.create(
            case=closed, frequency_hz=f * MHZ, level=level, limit_level=LIMIT, confirmed=True
        )
    case_svc.case_close(case=closed, by=lead, closure="waived", reason="Accepted by the customer")
    return {
        "team": team.pk,
        "team_slug": team.slug,
        "product": product.pk,
        "revision": revision.pk,
        "source": source.pk,
        "case": case.pk,
        "ff": ff.pk,
        "proposal": proposal.pk,
        "scan": scan.pk,
        "capture": capture.pk,
        "cm": cm.pk,
        "verification": verification.pk,
        "closed": closed.pk,
        "closed_scan": closed_scan.pk,
        "verified_cm": shield.pk,
        "scan_path": m.Scan.objects.get(pk=scan.pk).file.name,
        "capture_path": m.Capture.objects.get(pk=capture.pk).file.name,
    }


def _rows_of(team) -> dict[str, set[int]]:
    """Every row of ``team`` by list, read here from the model's own foreign keys."""

    def ids(qs) -> set[int]:
        return set(qs.values_list("pk", flat=True))

    return {
        "teams": {team.pk},
        "products": ids(m.Product.objects.filter(team=team)),
        "revisions": ids(m.Revision.objects.filter(product__team=team)),
        "sources": ids(m.EmissionSource.objects.filter(revision__product__team=team)),
        "cases": ids(m.Case.objects.filter(product__team=team)),
        "failing-frequencies": ids(m.FailingFrequency.objects.filter(case__product__team=team)),
        "scans": ids(m.Scan.objects.filter(revision__product__team=team)),
        "captures": ids(m.Capture.objects.filter(case__product__team=team)),
        "countermeasures": ids(m.Countermeasure.objects.filter(case__product__team=team)),
        "verifications": ids(
            m.Verification.objects.filter(countermeasure__case__product__team=team)
        ),
        "audit": ids(m.AuditEvent.objects.filter(team=team)),
    }


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker, tmp_path_factory):
    """Both teams' worlds, built once; rolled back (and the uploads folder dropped) after the module."""
    media = tmp_path_factory.mktemp("access-media")
    with override_settings(MEDIA_ROOT=str(media)), django_db_blocker.unblock():
        with transaction.atomic():
            user = get_user_model().objects.create_user
            users = {
                name: user(username=name, password="pw-for-tests-only", first_name=name.title())
                for name in ("lead", "engineer", "viewer", "outsider", "newcomer")
            }
            team = m.Team.objects.create(
                name="Bench", slug="bench", guard_band_db=3.0, frequency_tolerance_pct=0.5
            )
            far = m.Team.objects.create(name="Far", slug="far")
            viewer_membership = None
            for name, tm, role in (
                ("lead", team, "lead"),
                ("engineer", team, "engineer"),
                ("viewer", team, "viewer"),
                ("outsider", far, "lead"),
            ):
                ms = m.Membership.objects.create(team=tm, user=users[name], role=role)
                if name == "viewer":
                    viewer_membership = ms
            w = World(users=users)
            w.ids = _build_team(team, users["lead"], users["engineer"], "Bench")
            w.ids["viewer_membership"] = viewer_membership.pk
            far_ids = _build_team(far, users["outsider"], users["outsider"], "Far")
            w.ids.update({f"far_{k}": v for k, v in far_ids.items()})
            w.case_keys = {
                w.ids["case"]: "case",
                w.ids["closed"]: "closed",
                far_ids["case"]: "far_case",
                far_ids["closed"]: "far_closed",
            }
            w.mine, w.theirs = _rows_of(team), _rows_of(far)
            w.markers = {
                "mine": ["Bench controller", "Bench open case", "Bench closed case"],
                "theirs": ["Far controller", "Far open case", "Far closed case"],
            }
            w.media = Path(media)
            yield w
            transaction.set_rollback(True)


# ----------------------------------------------------------------- checking one cell


def snapshot(media: Path) -> dict:
    """Every row of the app's tables and of the accounts table, and the stored uploads.

    Plain SQL, one SELECT a table: the ORM's query building would cost more
    than the requests being checked.
    """
    models = [*apps.get_app_config("emicase").get_models(), get_user_model()]
    tables = sorted({model._meta.db_table for model in models})
    state = {}
    with connection.cursor() as cursor:
        if connection.vendor == "postgresql":
            # One round trip: each row as its text form, table by table.
            cursor.execute(
                " UNION ALL ".join(
                    f"(SELECT %s, x::text FROM {connection.ops.quote_name(t)} x ORDER BY x.id)"
                    for t in tables
                ),
                tables,
            )
            for table, row in cursor.fetchall():
                state.setdefault(table, []).append(row)
        else:
            for table in tables:
                cursor.execute(f"SELECT * FROM {connection.ops.quote_name(table)} ORDER BY 1")
                state[table] = cursor.fetchall()
    state["uploads"] = sorted(str(p) for p in (media / "uploads").rglob("*"))
    return state


def _client(row: Row, user):
    if row.api:
        client = APIClient()
        if user is not None:
            client.force_authenticate(user)
        return client
    client = Client()
    if user is not None:
        client.force_login(user)
    return client


def _send(client, row: Row, url: str, w: World):
    body = BODIES[row.body](w) if row.body else None
    call = getattr(client, row.method)
    if not row.api:
        return call(url, body) if body is not None else call(url)
    if body is None:
        return call(url)
    return call(url, body, format="multipart" if row.body in MULTIPART else "json")


def _given(row: Row, w: World) -> None:
    if row.given == "we_share":
        m.Team.objects.filter(pk=w.ids["team"]).update(share_closed_cases=True)
    elif row.given == "far_shares":
        m.Team.objects.filter(pk=w.ids["far_team"]).update(share_closed_cases=True)
    else:
        assert not row.given, row.given


LIST_KEYS = {
    "/api/teams/": "teams",
    "/api/products/": "products",
    "/api/revisions/": "revisions",
    "/api/sources/": "sources",
    "/api/cases/": "cases",
    "/api/failing-frequencies/": "failing-frequencies",
    "/api/scans/": "scans",
    "/api/captures/": "captures",
    "/api/countermeasures/": "countermeasures",
    "/api/verifications/": "verifications",
    "/api/audit/": "audit",
}


def _check_list(row: Row, response, expected: Out, w: World) -> None:
    if row.api:
        data = response.json()
        assert data["count"] <= 50, "the world fits one page"
        got = {r["id"] for r in data["results"]}
        key = LIST_KEYS[row.url]
        want = set() if expected.sees == "nothing" else getattr(w, expected.sees)[key]
        assert got == want, f"{key}: shown {sorted(got)}, expected {sorted(want)}"
        return
    html = response.content.decode()
    other = "theirs" if expected.sees == "mine" else "mine"
    assert w.markers[expected.sees][0] in html, "the caller's own product is on the page"
    leaked = [word for word in w.markers[other] if word in html]
    assert not leaked, f"another team's {leaked} on the page"


def _check_hits(row: Row, response, expected: Out, w: World, user) -> None:
    """The search shows exactly the expected cases; another team's (shared) case has no link."""
    mine = (
        {w.ids["case"], w.ids["closed"]}
        if user.username != "outsider"
        else {w.ids["far_case"], w.ids["far_closed"]}
    )
    if row.api:
        data = response.json()
        found = {r["case"]["id"]: r["case"]["url"] for r in data["results"]}
        # The counts say nothing about cases the caller may not see either.
        assert data["matched"] == data["candidates"] == len(found), data
    else:
        # One <li class="hit"> per case found (templates/emicase/search/_hits.html).
        blocks = response.content.decode().split('<li class="hit">')[1:]
        titles = dict(m.Case.objects.filter(pk__in=w.case_keys).values_list("pk", "title"))
        found = {}
        for block in blocks:
            named = [cid for cid, title in titles.items() if re.search(rf"\b{title}\b", block)]
            assert len(named) == 1, f"a hit names one of the world's cases: {block[:300]}"
            found[named[0]] = f'href="/cases/{named[0]}/"' in block
    keys = {w.case_keys.get(cid, f"unexpected case {cid}") for cid in found}
    assert keys == set(expected.sees), f"found {sorted(keys)}"
    for cid, link in found.items():
        if cid in mine:
            assert link, f"own case {w.case_keys[cid]} is linked"
        else:
            assert not link, f"shared case {w.case_keys[cid]} has no link to its page"


def check(row: Row, role: str, w: World) -> None:
    user = None if role == "anonymous" else w.users[role]
    expected = row.expect[role]
    _given(row, w)
    client = _client(row, user)  # signing in is audited: before the snapshot
    url = row.url.format(**w.ids)
    before = snapshot(w.media) if expected.changed is not None else None
    response = _send(client, row, url, w)
    assert response.status_code == expected.status, (
        f"{row.method.upper()} {url} as {role}: {response.status_code}, expected {expected!r}\n"
        + response.content.decode(errors="replace")[:800]
    )
    if expected.login:
        assert response["Location"].startswith("/signin/?next="), response["Location"]
    elif row.api and expected.status == 401:
        assert response["WWW-Authenticate"] == "Token"
    elif expected.status == 302:
        assert not response["Location"].startswith("/signin/"), response["Location"]
    if expected.sees is not None:
        if isinstance(expected.sees, frozenset):
            _check_hits(row, response, expected, w, user)
        else:
            _check_list(row, response, expected, w)
    if expected.attachment:
        assert response["Content-Disposition"].startswith("attachment"), response[
            "Content-Disposition"
        ]
        kind, pk = re.search(r"/(scans|captures)/(\d+)/", url).groups()
        stored = (m.Scan if kind == "scans" else m.Capture).objects.get(pk=pk)
        with stored.file.open("rb") as fh:
            assert b"".join(response.streaming_content) == fh.read()
    if expected.changed is not None:
        after = snapshot(w.media)
        if expected.changed:
            assert after != before, "the write was accepted but nothing changed"
        else:
            changed = [k for k in before if before[k] != after[k]]
            assert not changed, f"refused, yet {changed} changed"


@pytest.mark.parametrize(
    "row, role",
    [pytest.param(row, role, id=f"{row.id}-{role}") for row in MATRIX for role in ROLES],
)
def test_access(world, db, row, role):
    check(row, role, world)


def test_the_matrix_covers_every_role_and_object_type():
    """Each row names an outcome for every role; every object type of the brief has rows."""
    assert all(set(row.expect) == set(ROLES) for row in MATRIX)
    things = {row.thing for row in MATRIX}
    assert {
        "team",
        "product",
        "revision",
        "source",
        "case",
        "failing freq",
        "scan",
        "capture",
        "countermeasure",
        "verification",
        "comment",
        "search",
    } <= things
    assert len({row.id for row in MATRIX}) == len(MATRIX), "row names are unique"


@pytest.mark.parametrize(
    "url, body",
    [
        ("/api/products/", lambda pk: {"team": pk, "name": "Valve node"}),
        ("/api/cases/", lambda pk: {"product": pk, "title": "Conducted fail"}),
        (
            "/api/countermeasures/",
            lambda pk: {"case": pk, "revision": pk, "kind": "other", "description": "x"},
        ),
    ],
)
def test_a_reference_to_another_teams_object_reads_as_a_missing_one(world, db, url, body):
    """The API's 400 for our object (BAD in the matrix) says what it says for an id nobody has."""
    key = {"/api/products/": "team", "/api/cases/": "product", "/api/countermeasures/": "case"}[url]
    client = APIClient()
    client.force_authenticate(world.users["outsider"])
    ours, missing = world.ids[key], 2**40
    words = [
        client.post(url, body(pk), format="json").json()[key][0].replace(str(pk), "<id>")
        for pk in (ours, missing)
    ]
    assert words[0] == words[1] and "in your teams" in words[0], words


# Routes that hold no team's data: the sign-in pages, the load balancer's probe, the
# per-user token pages, the API's root, schema and docs, and Django's admin (staff only).
NOT_TEAM_DATA = ("admin/", "signin/", "signout/", "health/", "account/", "api/docs/", "api/schema/")


def _all_routes(patterns, prefix: str = ""):
    for p in patterns:
        if hasattr(p, "url_patterns"):
            yield from _all_routes(p.url_patterns, prefix + str(p.pattern))
        else:
            yield (prefix + str(p.pattern)).replace("^", "")


def test_every_route_with_team_data_has_a_row():
    """A new page or endpoint fails here until the matrix says who may use it."""
    from collections import defaultdict
    from urllib.parse import urlsplit

    from django.urls import Resolver404, get_resolver, resolve

    dummy = defaultdict(lambda: "1", team_slug="bench", far_team_slug="far")
    covered = set()
    for row in MATRIX:
        try:
            match = resolve(urlsplit(row.url.format_map(dummy)).path)
        except Resolver404:
            continue  # /media/...: no route, which is the point of those rows
        covered.add(match.route.replace("^", ""))
    routes = {
        r for r in _all_routes(get_resolver().url_patterns) if not r.startswith(NOT_TEAM_DATA)
    } - {"api/"}
    assert routes - covered == set()
