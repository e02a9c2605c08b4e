"""Tests of sagfit.traceability: instrument calibration status on the test date."""

from __future__ import annotations

import datetime as dt

from sagfit.io.bench import Instrument
from sagfit.core.traceability import (DUE_SOON_DAYS, calibration_warnings, date_of_test,
                                 instrument_rows)

D = dt.date


class TestDateOfTest:
    def test_iso_date_from_the_file(self):
        """A '# date:' ISO date (or date-time) is the test date."""
        assert date_of_test({"date": "2026-11-03"}) == (D(2026, 11, 3), "file")
        assert date_of_test({"date": "2026-11-03T14:05:00"})[0] == D(2026, 11, 3)

    def test_fallback_to_today_says_why(self):
        """No date, or an unreadable one, falls back to today with the reason."""
        today = D(2026, 12, 1)
        d, why = date_of_test({}, today=today)
        assert d == today and "no '# date:' line" in why
        d, why = date_of_test({"date": "3rd of Nov"}, today=today)
        assert d == today and "not an ISO date" in why


class TestCalibration:
    INST = (Instrument("voltage", "DMM-T2", "0.015%+2mV", D(2027, 5, 1)),
            Instrument("current", "ELOAD-T2", "0.2%+1mA", D(2026, 11, 2)),
            Instrument("load", "R-box 4", "1%", None))

    def test_past_due_is_a_warning_naming_the_instrument(self):
        """A due date before the test date gives one warning naming instrument and dates."""
        w = calibration_warnings(self.INST, D(2026, 11, 3))
        assert len(w) == 1
        assert "ammeter ELOAD-T2" in w[0] and "2026-11-02" in w[0] and "1 day before" in w[0]

    def test_due_on_the_test_date_is_still_current(self):
        """Calibration due on the test date itself is not past due."""
        assert calibration_warnings(self.INST, D(2026, 11, 2)) == []

    def test_status_rows(self):
        """Each instrument gets a status: current, due soon, past due, no due date stated."""
        rows = instrument_rows(self.INST, D(2027, 4, 20))
        assert [r["status"] for r in rows] == ["due soon", "past due", "no due date stated"]
        assert rows[0]["days_left"] == 11 <= DUE_SOON_DAYS
        rows = instrument_rows(self.INST[:1], D(2026, 11, 3))
        assert rows[0]["status"] == "current" and rows[0]["calibration_due"] == "2027-05-01"

    def test_json_form_is_accepted(self):
        """The instruments' JSON form (ISO text dates) works the same."""
        as_json = [i.to_dict() for i in self.INST]
        assert calibration_warnings(as_json, D(2026, 11, 3)) == \
            calibration_warnings(self.INST, D(2026, 11, 3))


class TestRecord:
    def test_record_is_json_ready(self):
        """The record has the test date, its source, the rows and the warnings."""
        import json

        from sagfit.core.traceability import traceability_record

        rec = traceability_record(TestCalibration.INST, {"date": "2026-11-03"})
        assert rec["test_date"] == "2026-11-03" and rec["test_date_source"] == "file"
        assert len(rec["instruments"]) == 3 and len(rec["warnings"]) == 1
        json.dumps(rec, allow_nan=False)
