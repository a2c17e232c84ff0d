"""On-call pages: server-rendered templates with inline SVG charts; no CDN, no JavaScript.

``routes`` holds the pages and the two forms (override, roll back), ``svg`` the drawing code,
``trends`` the series of the model page, ``format`` how times and numbers are written,
``csrf`` the form tokens and ``deps`` who is looking at a page.
"""
