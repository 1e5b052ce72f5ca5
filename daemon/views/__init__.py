"""Views: what operators read, drawn from the state.

The segments table, the status screen (:mod:`.status_text`) and page
(:mod:`.status_page`), alert notifications as text (:mod:`.alert_text`), the
self-contained HTML report and the plots of the report and the status page, with their
time axis. Views draw plain data that :mod:`shoal.daemon.state.readout` read;
:mod:`.report_data` gathers what the report shows (from readout, and from labels files
and recent inputs for its axis and its sample); they write nothing but the report
file. May import config, core, errors, files, model, state, segment
names, runtime's progress, intake's ``input_kind`` and ingest's ``open_input`` (the
report's sample of recent inputs is opened as ingest opens an input; that opener
belongs below both, in files).
"""
