"""Handing an uploaded trace back to a member of its team.

Uploaded files live under MEDIA_ROOT with generated names and are never
served from a public URL: the page view and the API action both check the
reader's team first (``selectors.access_scan`` / ``access_capture``, a 404 for
anyone else) and then stream the file through here.
"""

from __future__ import annotations

from django.http import FileResponse, Http404

from emicase.models import AnalysedUpload, Capture
from emicase.services.audit import Verb, audit_record


def upload_file_response(upload: AnalysedUpload, *, by, request=None) -> FileResponse:
    """The stored file as an attachment named as it was uploaded; logged in the team's audit log."""
    try:
        handle = upload.file.open("rb")
    except (FileNotFoundError, ValueError) as exc:
        raise Http404("The uploaded file is no longer stored.") from exc
    team_id = upload.case.product.team_id if isinstance(upload, Capture) else upload.revision.product.team_id
    audit_record(team=team_id, verb=Verb.FILE_DOWNLOADED, by=by, obj=upload, request=request,
                 text=upload.original_name)
    # An attachment of an opaque type: a hostile upload (HTML, script) is never rendered by the browser.
    response = FileResponse(handle, as_attachment=True, filename=upload.original_name,
                            content_type="application/octet-stream")
    response["X-Content-Type-Options"] = "nosniff"
    response["Content-Security-Policy"] = "sandbox"
    return response
