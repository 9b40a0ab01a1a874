"""Renderers of a harness Report: text (terminal), JUnit XML, HTML and Markdown."""
