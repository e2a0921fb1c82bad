// Measures a rendered report page in the browser (tests/monitor/test_report.py injects this into
// a copy of the page shown in a frame; the report itself carries no scripts). Posts one JSON object to the
// page around the frame:
//   innerWidth, scrollWidth  - the page must not be wider than the window (no sideways scroll);
//   stickingOut              - elements reaching past the window's right edge outside a box that scrolls;
//   wrapped                  - numbers (and number pairs like "0.70 / 26") broken across two lines;
//   charts                   - per chart: the picture chosen (narrow or wide) and its text size in px.
addEventListener("load", () => {
  const W = window.innerWidth;
  const scrolls = (el) => ["auto", "scroll"].includes(getComputedStyle(el).overflowX);
  const stickingOut = [];
  for (const el of document.body.querySelectorAll("*")) {
    const r = el.getBoundingClientRect();
    if (r.width === 0 || r.right <= W + 0.5) continue;
    let box = el.parentElement, inScroll = false;
    while (box && box !== document.body) {
      if (scrolls(box) && box.getBoundingClientRect().right <= W + 0.5) { inScroll = true; break; }
      box = box.parentElement;
    }
    if (!inScroll) stickingOut.push(`${el.tagName.toLowerCase()}.${el.className}: right ${Math.round(r.right)} > ${W}`);
  }
  const wrapped = [];
  const number = String.raw`[-+\u2212]?\d[\d.,:]*%?`;
  const patterns = [
    new RegExp(`${number}(?:\\s*[/\u2013\u2026\u00b1]\\s*${number})+`, "g"),   // pairs: "0.70 / 26", "0.1 – 0.2"
    /[^\s]*\d[^\s]*/g,                                                        // any word with a digit in it
  ];
  const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
  for (let node = walker.nextNode(); node; node = walker.nextNode()) {
    for (const re of patterns) {
      for (const m of node.data.matchAll(re)) {
        const range = document.createRange();
        range.setStart(node, m.index);
        range.setEnd(node, m.index + m[0].length);
        const tops = [...range.getClientRects()].filter((x) => x.width > 0).map((x) => x.top);
        if (tops.length && Math.max(...tops) - Math.min(...tops) > 4) wrapped.push(m[0]);
      }
    }
  }
  const charts = [...document.querySelectorAll("figure img")].map((img) => {
    const shown = img.getBoundingClientRect().width;
    return {
      narrow: img.currentSrc !== img.getAttribute("src"),
      // the figure's text is FONT_PT points at its natural size; drawn at `shown` px wide
      textPx: (FONT_PT * 4 / 3) * shown / img.naturalWidth,
      shown, natural: img.naturalWidth,
    };
  });
  parent.postMessage(JSON.stringify({
    innerWidth: W, scrollWidth: document.documentElement.scrollWidth, stickingOut, wrapped, charts,
    scrollingTables: [...document.querySelectorAll(".scroll")].filter((b) => b.scrollWidth > b.clientWidth).length,
  }), "*");
});
