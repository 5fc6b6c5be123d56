"""Back-lit previews of baked maps: a self-contained viewer page and stills rendered by headless Chromium.

``page`` builds the HTML (asset, maps and the vendored three.js inside), ``scene`` reads maps and
sidecars into entries, ``still`` renders a frame with Chromium; ``viewer.js`` is the page's own
shading code.  This layer reads maps and sidecars and never bakes.
"""
