// isogloss review page: plays the recording, shows the machine transcript coloured by
// certainty, keeps the transcriber's corrections in local storage and exports them.
(function () {
  "use strict";
  var data = JSON.parse(document.getElementById("isogloss-data").textContent);
  var storeKey = "isogloss-review:" + data.key;
  var audio = document.getElementById("player");
  var transcript = document.getElementById("transcript");
  var statusLine = document.getElementById("status");
  var audioNotice = document.getElementById("audio-notice");
  var storageNotice = document.getElementById("storage-notice");

  // Words of all stretches in one flat list; times in seconds.
  var words = [], starts = [], ends = [], certs = [], owner = [], first = [];
  data.stretches.forEach(function (s, i) {
    first.push(words.length);
    for (var k = 0; k < s.w.length; k++) {
      words.push(s.w[k]);
      starts.push(s.t[2 * k] / 1000);
      ends.push(s.t[2 * k + 1] / 1000);
      certs.push(s.c[k]);
      owner.push(i);
    }
  });
  first.push(words.length);

  var state = load();
  // Words and labels this copy of the page changed since it loaded (see `merge`).
  var mine = { words: {}, labels: {} };
  var selected = -1, playing = -1, stopAt = null, editing = null;

  // A stored state from its JSON text; null when absent or of another shape (throws on text
  // that is not JSON).
  function parseState(raw) {
    if (!raw) return null;
    var v = JSON.parse(raw);
    return v && v.words && v.stretches && typeof v.words === "object" &&
      typeof v.stretches === "object" ? v : null;
  }

  function load() {
    try {
      var v = parseState(window.localStorage.getItem(storeKey));
      if (v) return v;
    } catch (e) {
      storageTrouble(e);
    }
    return { words: {}, stretches: {} };
  }

  function save() {
    state.saved = new Date().toISOString();
    try {
      window.localStorage.setItem(storeKey, JSON.stringify(state));
      say("Corrections saved in this browser (" + countEdits() + " words, " +
        Object.keys(state.stretches).length + " stretch labels).");
    } catch (e) {
      storageTrouble(e);
    }
  }

  function storageTrouble(e) {
    storageNotice.hidden = false;
    storageNotice.textContent = "This browser does not keep corrections for this page (" +
      (e && e.name ? e.name : "local storage unavailable") +
      "). Export the TSV before closing the tab, or nothing of your work is kept.";
  }

  function countEdits() { return Object.keys(state.words).length; }
  function say(text) { statusLine.textContent = text; }

  function esc(text) {
    return String(text).replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;")
      .replace(/"/g, "&quot;");
  }

  function clock(seconds) {
    var ms = Math.round(seconds * 1000);
    var h = Math.floor(ms / 3600000), m = Math.floor(ms / 60000) % 60;
    var s = Math.floor(ms / 1000) % 60, f = ms % 1000;
    function two(n) { return (n < 10 ? "0" : "") + n; }
    return two(h) + ":" + two(m) + ":" + two(s) + "." + ("00" + f).slice(-3);
  }

  function level(c) {
    for (var i = 0; i < data.levels.length; i++) if (c >= data.levels[i]) return i;
    return data.levels.length;
  }

  function textOf(k) { return Object.prototype.hasOwnProperty.call(state.words, k) ? state.words[k] : words[k]; }

  function wordHtml(k) {
    var edited = Object.prototype.hasOwnProperty.call(state.words, k);
    var text = textOf(k);
    var cls = "w l" + level(certs[k]) + (edited ? " ed" : "") + (edited && text === "" ? " del" : "") +
      (k === selected ? " sel" : "") + (k === playing ? " now" : "");
    return '<span class="' + cls + '" data-k="' + k + '">' + esc(text === "" ? words[k] : text) + "</span>";
  }

  function stretchLabel(i, field) {
    var own = state.stretches[i];
    if (own && typeof own[field] === "string") return own[field];
    return data.stretches[i][field];
  }

  function render() {
    var html = [];
    data.stretches.forEach(function (s, i) {
      html.push('<section class="st" data-s="' + i + '"><div class="sh"><button class="play" data-s="' + i +
        '" title="play this stretch (R)">&#9654; ' + clock(s.from / 1000) + " &ndash; " + clock(s.to / 1000) +
        '</button><span class="sid">' + esc(s.id) + '</span><label>speaker <input class="lab" data-f="speaker" data-s="' +
        i + '" value="' + esc(stretchLabel(i, "speaker")) + '"></label><label>dialect <input class="lab" data-f="dialect" data-s="' +
        i + '" value="' + esc(stretchLabel(i, "dialect")) + '"></label></div><p class="ws">');
      for (var k = first[i]; k < first[i + 1]; k++) html.push(wordHtml(k), " ");
      html.push("</p></section>");
    });
    transcript.innerHTML = html.join("");
  }

  function span(k) { return k < 0 ? null : transcript.querySelector('span[data-k="' + k + '"]'); }

  // Selection and the playing word are classes toggled on the existing elements, never a
  // re-render: a double click must reach the element its first click landed on.
  function mark(k, cls, on) {
    var element = span(k);
    if (element) element.classList.toggle(cls, on);
  }

  function select(k, scroll) {
    mark(selected, "sel", false);
    selected = k;
    mark(k, "sel", true);
    if (k >= 0) {
      var edited = Object.prototype.hasOwnProperty.call(state.words, k);
      say("Word " + (k + 1) + " of " + words.length + ", " + clock(starts[k]) + "–" + clock(ends[k]) +
        ", confidence " + (certs[k] / 100).toFixed(2) + (edited ? ', machine wrote "' + words[k] + '"' : ""));
      if (scroll) reveal(span(k));
    }
  }

  function reveal(element) {
    if (!element) return;
    var box = element.getBoundingClientRect();
    var header = document.querySelector("header").getBoundingClientRect().bottom;
    if (box.top < header || box.bottom > window.innerHeight) element.scrollIntoView({ block: "center" });
  }

  function play() {
    var promise = audio.play();
    if (promise && promise.catch) {
      promise.catch(function (e) {
        if (e && e.name !== "AbortError") say("The audio does not play: " + e.message);
      });
    }
  }

  function seek(seconds, andPlay) {
    stopAt = null;
    audio.currentTime = seconds;
    if (andPlay) play();
  }

  function playStretch(i) {
    var s = data.stretches[i];
    seek(s.from / 1000, false);
    stopAt = s.to / 1000;
    play();
  }

  // The word at time t: the last word starting at or before t, if t is before its end.
  function wordAt(t) {
    var lo = 0, hi = starts.length - 1, found = -1;
    while (lo <= hi) {
      var mid = (lo + hi) >> 1;
      if (starts[mid] <= t) { found = mid; lo = mid + 1; } else hi = mid - 1;
    }
    return found >= 0 && t < ends[found] ? found : -1;
  }

  function stretchAt(t) {
    for (var i = 0; i < data.stretches.length; i++) {
      if (t < data.stretches[i].to / 1000) return i;
    }
    return data.stretches.length - 1;
  }

  function follow() {
    var t = audio.currentTime;
    if (stopAt !== null && t >= stopAt) {
      audio.pause();
      stopAt = null;
    }
    var k = wordAt(t);
    if (k !== playing) {
      mark(playing, "now", false);
      playing = k;
      mark(k, "now", true);
      if (k >= 0 && !audio.paused) reveal(span(k));
    }
    if (!audio.paused) window.requestAnimationFrame(follow);
  }

  function startEdit(k) {
    if (k < 0) return;
    finishEdit(true);
    var target = span(k);
    if (!target) return;
    var input = document.createElement("input");
    input.className = "edit";
    input.value = textOf(k);
    input.size = Math.max(input.value.length + 2, 6);
    input.setAttribute("aria-label", "correction of word " + (k + 1));
    editing = { k: k, input: input };
    target.replaceWith(input);
    input.focus();
    input.select();
    input.addEventListener("keydown", function (e) {
      if (e.key === "Enter") { e.preventDefault(); finishEdit(true); }
      else if (e.key === "Escape") { e.preventDefault(); finishEdit(false); }
      else if (e.key === "Tab") {
        e.preventDefault();
        var next = e.shiftKey ? k - 1 : k + 1;
        finishEdit(true);
        if (next >= 0 && next < words.length) { select(next, true); startEdit(next); }
      }
    });
    input.addEventListener("blur", function () { if (editing && editing.input === input) finishEdit(true); });
  }

  function finishEdit(keep) {
    if (!editing) return;
    var k = editing.k, input = editing.input;
    editing = null;
    if (keep) {
      var value = input.value.replace(/\s+/g, " ").trim();
      if (value === words[k]) delete state.words[k];
      else state.words[k] = value;
      mine.words[k] = true;
      save();
    }
    input.outerHTML = wordHtml(k);
  }

  function nextLow(from, step) {
    for (var k = from + step; k >= 0 && k < words.length; k += step) {
      if (certs[k] < data.low) return k;
    }
    return -1;
  }

  function finalText(i) {
    var out = [];
    for (var k = first[i]; k < first[i + 1]; k++) {
      var t = textOf(k);
      if (t !== "") out.push(t);
    }
    return out.join(" ");
  }

  function oneLine(text) { return String(text).replace(/[\t\r\n]+/g, " ").trim(); }

  // The corrected transcript as manifest rows; stretches left without words are omitted.
  function exportTsv() {
    var lines = [["id", "audio", "start", "end", "speaker", "dialect", data.column].join("\t")];
    data.stretches.forEach(function (s, i) {
      var text = oneLine(finalText(i));
      if (text === "") return;
      lines.push([s.id, data.source, (s.from / 1000).toFixed(3), (s.to / 1000).toFixed(3),
        oneLine(stretchLabel(i, "speaker")), oneLine(stretchLabel(i, "dialect")), text].join("\t"));
    });
    return lines.join("\n") + "\n";
  }

  function cueText(text) {
    return oneLine(text).replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;");
  }

  // The corrected transcript as WebVTT: one cue per stretch, the speaker as a voice span.
  function exportVtt() {
    var out = "WEBVTT\n\n", n = 0, last = 0;
    data.stretches.forEach(function (s, i) {
      var text = finalText(i);
      if (oneLine(text) === "") return;
      var from = Math.max(s.from / 1000, last), to = Math.max(s.to / 1000, from + 0.001);
      last = from;
      var speaker = oneLine(stretchLabel(i, "speaker")).replace(/[<>&]/g, "");
      n += 1;
      out += n + "\n" + clock(from) + " --> " + clock(to) + "\n" +
        (speaker ? "<v " + speaker + ">" : "") + cueText(text) + "\n\n";
    });
    return out;
  }

  function download(name, text, type) {
    var link = document.createElement("a");
    link.href = URL.createObjectURL(new Blob([text], { type: type }));
    link.download = name;
    document.body.appendChild(link);
    link.click();
    window.setTimeout(function () { URL.revokeObjectURL(link.href); link.remove(); }, 1000);
  }

  function mediaProblem(code) {
    return ["", "loading was aborted", "a read error", "the data could not be decoded",
      "the format is not supported"][code] || "an unknown problem";
  }

  function useAudio(href) {
    audio.src = href;
    audio.load();
  }

  var onConverted = data.audio === data.converted;
  audio.addEventListener("error", function () {
    var reason = mediaProblem(audio.error ? audio.error.code : 0);
    audioNotice.hidden = false;
    if (!onConverted && data.converted) {
      onConverted = true;
      audioNotice.innerHTML = "This browser cannot play <b>" + esc(data.source) + "</b> (" + esc(reason) +
        "). The page plays the converted copy <a href=\"" + esc(data.converted) + "\" download>" +
        esc(data.converted) + "</a> instead.";
      useAudio(data.converted);
    } else if (!data.converted) {
      audioNotice.innerHTML = "This browser cannot play <b>" + esc(data.source) + "</b> (" + esc(reason) +
        "). Write a converted copy that every browser plays with <code>isogloss review … --convert-audio always</code>.";
    } else {
      audioNotice.innerHTML = "This browser cannot play <b>" + esc(data.source) + "</b> nor its converted copy <a href=\"" +
        esc(data.converted) + "\" download>" + esc(data.converted) + "</a> (" + esc(reason) + ").";
    }
  });
  audio.addEventListener("play", function () { window.requestAnimationFrame(follow); });
  audio.addEventListener("seeked", follow);

  transcript.addEventListener("click", function (e) {
    var target = e.target;
    if (target.classList.contains("w")) {
      var k = Number(target.getAttribute("data-k"));
      select(k, false);
      seek(starts[k], true);
    } else if (target.classList.contains("play")) {
      playStretch(Number(target.getAttribute("data-s")));
    }
  });
  transcript.addEventListener("dblclick", function (e) {
    if (e.target.classList.contains("w")) {
      audio.pause();
      startEdit(Number(e.target.getAttribute("data-k")));
    }
  });
  transcript.addEventListener("input", function (e) {
    var target = e.target;
    if (!target.classList.contains("lab")) return;
    var i = Number(target.getAttribute("data-s"));
    var labels = state.stretches[i] || {};
    labels[target.getAttribute("data-f")] = target.value;
    state.stretches[i] = labels;
    mine.labels[i + ":" + target.getAttribute("data-f")] = true;
    save();
  });

  document.getElementById("export-tsv").addEventListener("click", function () {
    download(data.name + ".tsv", exportTsv(), "text/tab-separated-values");
  });
  document.getElementById("export-vtt").addEventListener("click", function () {
    download(data.name + ".vtt", exportVtt(), "text/vtt");
  });
  document.getElementById("show-help").addEventListener("click", function () {
    var help = document.getElementById("help");
    help.hidden = !help.hidden;
  });
  document.getElementById("forget").addEventListener("click", function () {
    if (!window.confirm("Forget all " + countEdits() + " corrections and the stretch labels of this page?")) return;
    state = { words: {}, stretches: {} };
    mine = { words: {}, labels: {} };
    try { window.localStorage.removeItem(storeKey); } catch (e) { storageTrouble(e); }
    render();
    say("Corrections forgotten.");
  });

  // Another copy of this page (a second tab, or a load that started before this browser had
  // stored the last one's corrections) saved. Take its value of every word and label; keep this
  // copy's own change where the other copy has none (and store the union), so that two open
  // copies never wipe out each other's work. Where both changed the same word differently, the
  // later save wins. Only saving what the other copy lacks keeps two copies from answering
  // each other forever.
  function merge(other) {
    var own = Object.prototype.hasOwnProperty, keep = false;
    function one(ours, theirs, flag, flags) {
      if (ours === theirs) return ours;
      if (flags[flag] && ours !== null && theirs === null) { keep = true; return ours; }
      delete flags[flag];
      return theirs;
    }
    var keys = {};
    Object.keys(state.words).concat(Object.keys(other.words)).forEach(function (k) { keys[k] = true; });
    Object.keys(keys).forEach(function (key) {
      var k = Number(key);
      if (!(k >= 0 && k < words.length)) return;
      var ours = own.call(state.words, k) ? state.words[k] : null;
      var theirs = own.call(other.words, k) ? String(other.words[k]) : null;
      var value = one(ours, theirs, k, mine.words);
      if (value === ours) return;
      if (value === null) delete state.words[k]; else state.words[k] = value;
      if (editing && editing.k === k) return;
      var element = span(k);
      if (element) element.outerHTML = wordHtml(k);
    });
    data.stretches.forEach(function (s, i) {
      ["speaker", "dialect"].forEach(function (f) {
        var ours = state.stretches[i] && typeof state.stretches[i][f] === "string" ? state.stretches[i][f] : null;
        var theirs = other.stretches[i] && typeof other.stretches[i][f] === "string" ? other.stretches[i][f] : null;
        var value = one(ours, theirs, i + ":" + f, mine.labels);
        if (value === ours) return;
        var labels = state.stretches[i] || {};
        if (value === null) delete labels[f]; else labels[f] = value;
        if (Object.keys(labels).length) state.stretches[i] = labels; else delete state.stretches[i];
        var input = transcript.querySelector('input.lab[data-s="' + i + '"][data-f="' + f + '"]');
        if (input && input !== document.activeElement) input.value = stretchLabel(i, f);
      });
    });
    if (keep) save();
    else say("Corrections from another copy of this page taken in (" + countEdits() + " words).");
  }

  window.addEventListener("storage", function (e) {
    if (e.storageArea !== window.localStorage || (e.key !== null && e.key !== storeKey)) return;
    var other = { words: {}, stretches: {} };
    if (e.key !== null && e.newValue) {
      try {
        other = parseState(e.newValue);
      } catch (err) {
        return;
      }
      if (!other) return;
    }
    merge(other);
  });

  function togglePlay() {
    if (audio.paused) { stopAt = null; play(); } else audio.pause();
  }

  document.addEventListener("keydown", function (e) {
    var tag = e.target && e.target.tagName;
    if (tag === "INPUT" || tag === "TEXTAREA") {
      if (e.key === " " && e.ctrlKey) { e.preventDefault(); togglePlay(); }
      else if (e.key === "Escape" && e.target.classList.contains("lab")) e.target.blur();
      return;
    }
    if (e.altKey || e.metaKey || (e.ctrlKey && e.key !== " ")) return;
    var current = selected >= 0 ? selected : Math.max(playing, -1);
    var k;
    switch (e.key) {
      case " ": e.preventDefault(); togglePlay(); break;
      case "ArrowRight": case "ArrowLeft":
        e.preventDefault();
        k = Math.min(Math.max(current + (e.key === "ArrowRight" ? 1 : -1), 0), words.length - 1);
        if (words.length) { select(k, true); seek(starts[k], !audio.paused); }
        break;
      case "n": case "N":
        k = nextLow(current < 0 && e.key === "N" ? words.length : current, e.key === "n" ? 1 : -1);
        if (k >= 0) { select(k, true); seek(starts[k], true); } else say("No more words below the review threshold in that direction.");
        break;
      case "r": case "R":
        playStretch(current >= 0 ? owner[current] : stretchAt(audio.currentTime));
        break;
      case "Enter": case "e": case "E":
        e.preventDefault();
        audio.pause();
        startEdit(current);
        break;
      case "?":
        document.getElementById("show-help").click();
        break;
      default:
    }
  });

  if (data.note) {
    audioNotice.hidden = false;
    audioNotice.textContent = data.note;
  }
  render();
  useAudio(data.audio);
  say(words.length + " words in " + data.stretches.length + " stretches; " +
    countEdits() + " corrections kept in this browser.");
  window.isoglossReview = { exportTsv: exportTsv, exportVtt: exportVtt, words: words.length };
  performance.mark("isogloss-ready");
  // the first frame with the words on screen: the moment the page is usable
  window.requestAnimationFrame(function () {
    window.setTimeout(function () { performance.mark("isogloss-shown"); }, 0);
  });
})();
