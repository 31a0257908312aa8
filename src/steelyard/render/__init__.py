"""Renderers: each turns a document or report into a ``str``; none does I/O or reads a clock."""
