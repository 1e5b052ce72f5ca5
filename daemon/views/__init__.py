"""Views: what operators read, drawn from the state.

The segments table, the self-contained HTML report and the plots of the report and the
status page, with their time axis."""
