//! Markdown, JSON and SVG reports (filled in below).
