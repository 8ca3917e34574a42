// Hovering (or tabbing to) a domain in the result panel brings its net forward on the pattern at once, in the
// browser (no round trip): that domain's net and ticks drawn thick and opaque, the others faint.
// Leaving the button puts the figure back as the server drew it (a click pins a domain there).
(function () {
    function graph() { return document.querySelector("#graph .js-plotly-plot"); }
    function domainOf(name) {
        var m = /^Domain (\d+)( net|: predicted, no spot)$/.exec(name || "");
        return m ? { index: parseInt(m[1], 10) - 1, net: m[2] === " net" } : null;
    }
    function emphasise(focus) {
        var g = graph();
        if (!g || !g.data || !window.Plotly) { return; }
        var idx = [], width = [], opacity = [];
        g.data.forEach(function (t, i) {
            var d = domainOf(t.name);
            if (!d) { return; }
            if (focus === null) {  // back to the server's drawing (traces redrawn meanwhile have nothing saved)
                if (!t._recinetSaved) { return; }
                idx.push(i); width.push(t._recinetSaved.width); opacity.push(t._recinetSaved.opacity);
                return;
            }
            if (!t._recinetSaved) {
                t._recinetSaved = { width: (t.line || {}).width, opacity: t.opacity === undefined ? 1 : t.opacity };
            }
            idx.push(i);
            if (d.index === focus) {
                width.push(d.net ? 2.4 : t._recinetSaved.width); opacity.push(0.95);
            } else {
                width.push(d.net ? 0.8 : t._recinetSaved.width); opacity.push(0.15);
            }
        });
        if (idx.length) { window.Plotly.restyle(g, { "line.width": width, opacity: opacity }, idx); }
        if (focus === null) { g.data.forEach(function (t) { delete t._recinetSaved; }); }
    }
    function button(ev) { return ev.target.closest ? ev.target.closest("button.domain-button") : null; }
    function indexOf(b) {
        try { return JSON.parse(b.id).index; } catch (e) { return null; }
    }
    document.addEventListener("mouseover", function (ev) {
        var b = button(ev);
        if (b && !(ev.relatedTarget && b.contains(ev.relatedTarget))) { emphasise(indexOf(b)); }
    });
    document.addEventListener("mouseout", function (ev) {
        var b = button(ev);
        if (b && !(ev.relatedTarget && b.contains(ev.relatedTarget))) { emphasise(null); }
    });
    // the keyboard too: a domain button with the focus brings its net forward
    document.addEventListener("focusin", function (ev) { var b = button(ev); if (b) { emphasise(indexOf(b)); } });
    document.addEventListener("focusout", function (ev) { var b = button(ev); if (b) { emphasise(null); } });
})();
