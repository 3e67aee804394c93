"""A lead shares the team's closed cases, removes a member after confirming, and reads both in the audit log."""

from __future__ import annotations

import pytest

from emicase import models as m

pytestmark = pytest.mark.django_db(transaction=True)


def test_a_lead_shares_removes_a_member_and_reads_the_audit_log(sign_in, lead, viewer, team, screenshots):
    s = sign_in(lead)
    page = s.page
    page.goto(f"/teams/{team.slug}/settings/")
    page.check("#id_share_closed_cases")
    page.click("main form button[type=submit]")
    page.wait_for_selector("text=Team settings saved.")
    assert m.Team.objects.get(pk=team.pk).share_closed_cases is True

    page.click("text=Manage members")
    page.click(f"button[aria-label='Remove {viewer.username}']")
    # Nothing is removed before the confirmation; "Keep them" leaves it so.
    page.wait_for_selector("text=Remove from the team")
    page.click("text=Keep them")
    assert m.Membership.objects.filter(user=viewer, team=team).exists()
    page.click(f"button[aria-label='Remove {viewer.username}']")
    page.click("text=Remove from the team")
    page.wait_for_selector(f"text={viewer.username} no longer belongs to {team.name}.")
    assert not m.Membership.objects.filter(user=viewer, team=team).exists()

    page.goto(f"/teams/{team.slug}/audit/")
    rows = page.locator("main tbody tr")
    texts = [rows.nth(i).inner_text() for i in range(rows.count())]
    assert any("Member removed" in t and viewer.username in t for t in texts), texts
    assert any("Sharing changed" in t for t in texts), texts
    assert any("Signed in" in t and "lead" in t for t in texts), texts
    page.screenshot(path=str(screenshots / "team-audit.png"), full_page=True)
    assert not s.errors, s.errors
