"""Open a page in headless Chromium and measure it from inside the page.

A probe script is put at the top of a copy of the page: it records uncaught errors
and ``console.error`` calls, and after the page has loaded writes what it measured
(page and window widths, images that failed to load) as JSON into the DOM, which
``--dump-dom`` prints.  Nothing is fetched from the network: the pages under test
are self-contained and Chromium runs with networking features off.
"""

from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

PROBE = """<script>
(function(){
  var errors = [];
  window.addEventListener('error', function(e){
    errors.push(String(e.message || (e.target && (e.target.src || e.target.href)) ||
                'resource error'));
  }, true);
  var orig = console.error;
  console.error = function(){ errors.push(Array.from(arguments).join(' '));
                              return orig.apply(console, arguments); };
  window.addEventListener('load', function(){ setTimeout(function(){
    var imgs = Array.from(document.images);
    var out = {
      scrollWidth: document.documentElement.scrollWidth,
      innerWidth: window.innerWidth,
      images: imgs.length,
      brokenImages: imgs.filter(function(i){ return !(i.complete && i.naturalWidth > 0); })
                        .map(function(i){ return i.alt || i.src.slice(0, 40); }),
      overflowing: Array.from(document.querySelectorAll('body *')).filter(function(el){
          var st = getComputedStyle(el).overflowX;
          return (st === 'auto' || st === 'scroll') && el.scrollWidth > el.clientWidth + 1;
        }).map(function(el){
          var sec = el.closest('section'), th = el.querySelector('th');
          return (sec ? sec.id : '') + ': ' + (th ? th.textContent : el.tagName);
        }),
      errors: errors,
      extra: (window.__probeExtra ? window.__probeExtra() : null)
    };
    var pre = document.createElement('pre');
    pre.id = '__probe__';
    pre.textContent = JSON.stringify(out);
    document.body.appendChild(pre);
  }, 300); });
})();
</script>"""


def chromium_command(chromium: str, tmp: Path, *, width: int, height: int = 900) -> list:
    """The headless Chromium command line every browser test uses (no network features,
    a profile of its own under ``tmp``); the caller adds the action and the page."""
    return [
        chromium,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp / 'profile'}",
        f"--window-size={width},{height}",
    ]


def find_chromium() -> str | None:
    """Path of Chromium, installing Debian's package when this is a root Debian session;
    None (with the reason printed) where no browser can be had."""
    from _synthetic_run import ensure_debian_tool

    return ensure_debian_tool("chromium", "chromium")


def probe(chromium: str, page: Path, tmp: Path, *, width: int = 1400,
          extra_js: str = "") -> dict:
    """Measurements of ``page`` rendered at ``width`` px (see the module docstring).

    Besides the page's widths, images and errors, ``overflowing`` lists the scrolling
    boxes (``.wide`` table wrappers and the like) whose content is wider than the box,
    each as ``"<section id>: <first header>"``: content a reader must scroll sideways
    to see.
    """
    text = Path(page).read_text(encoding="utf-8")
    inject = PROBE + (f"<script>{extra_js}</script>" if extra_js else "")
    text = re.sub(r"(<head[^>]*>)", lambda m: m.group(1) + inject, text, count=1)
    copy = tmp / f"probe-{Path(page).name}"
    copy.write_text(text, encoding="utf-8")
    cmd = chromium_command(chromium, tmp, width=width) + [
        "--virtual-time-budget=10000",
        "--dump-dom",
        copy.as_uri(),
    ]
    done = subprocess.run(cmd, capture_output=True, timeout=180, check=False)
    dom = done.stdout.decode("utf-8", "replace")
    m = re.search(r'<pre id="__probe__">(.*?)</pre>', dom, re.S)
    if not m:
        raise AssertionError(
            "the probe did not report; chromium said: "
            + done.stderr.decode("utf-8", "replace")[-2000:]
        )
    import html

    return json.loads(html.unescape(m.group(1)))


def screenshot(chromium: str, page: Path, tmp: Path, *, width: int, height: int) -> Path:
    """A PNG screenshot of ``page`` in a ``width`` x ``height`` px window."""
    shot = tmp / f"shot-{width}x{height}.png"
    cmd = chromium_command(chromium, tmp, width=width, height=height) + [
        f"--screenshot={shot}",
        Path(page).as_uri(),
    ]
    subprocess.run(cmd, capture_output=True, timeout=180, check=False)
    return shot
