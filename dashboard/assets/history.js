// Undo and redo of every edit of the scenario (network, layers, doses, names, units): the page
// keeps the drafts it has had (window.dash_clientside.barrierflow, used by the clientside
// callbacks of dashboard/panels/history.py). Nothing of this goes to the server.
(function () {
    var LIMIT = 100;  // steps kept (at least 50 are promised)
    var no = function () { return window.dash_clientside.no_update; };
    var same = function (a, b) { return JSON.stringify(a) === JSON.stringify(b); };

    function record(draft, history) {
        // a new draft: the one before goes onto the undo list, the redo list is emptied
        if (!draft) { return no(); }
        if (!history || !history.current) { return {past: [], future: [], current: draft}; }
        if (same(draft, history.current)) { return no(); }  // an undo or redo, or no change
        var past = history.past.concat([history.current]);
        if (past.length > LIMIT) { past = past.slice(past.length - LIMIT); }
        return {past: past, future: [], current: draft};
    }

    function step(history, back) {
        // one step back (undo) or forward (redo): [draft, history] or null when there is none
        if (!history || !history.current) { return null; }
        var from = back ? history.past : history.future;
        if (!from.length) { return null; }
        var draft = from[from.length - 1];
        var rest = from.slice(0, from.length - 1);
        var other = (back ? history.future : history.past).concat([history.current]);
        var next = back ? {past: rest, future: other, current: draft} : {past: other, future: rest, current: draft};
        return [draft, next];
    }

    function undoRedo(nUndo, nRedo, history, loaded) {
        var ctx = window.dash_clientside.callback_context;
        var back = ctx.triggered_id === "edit-undo";
        var moved = step(history, back);
        if (!moved) { return [no(), no(), no(), no()]; }
        var draft = moved[0];
        var note = back ? "Undone: the scenario is as it was before that edit." : "Redone.";
        return [draft, moved[1], {gen: draft.gen, n: ((loaded && loaded.n) || 0) + 1}, note];
    }

    function buttons(history) {
        var past = (history && history.past.length) || 0;
        var future = (history && history.future.length) || 0;
        return [past === 0, future === 0,
                past ? "Undo the last edit (Ctrl+Z); " + past + " step" + (past === 1 ? "" : "s") + " back kept"
                     : "Nothing to undo",
                future ? "Redo (Ctrl+Y or Ctrl+Shift+Z); " + future + " step" + (future === 1 ? "" : "s") + " forward"
                       : "Nothing to redo"];
    }

    window.dash_clientside = Object.assign({}, window.dash_clientside);
    window.dash_clientside.barrierflow = Object.assign({}, window.dash_clientside.barrierflow,
        {record: record, step: step, undoRedo: undoRedo, buttons: buttons, historyLimit: LIMIT});

    // Ctrl+Z / Ctrl+Y / Ctrl+Shift+Z outside text fields (a field keeps its own undo of typing)
    document.addEventListener("keydown", function (event) {
        if (!(event.ctrlKey || event.metaKey) || event.altKey) { return; }
        var key = event.key.toLowerCase();
        var el = event.target;
        var typing = el && (el.tagName === "INPUT" || el.tagName === "TEXTAREA" || el.isContentEditable);
        if (typing || (key !== "z" && key !== "y")) { return; }
        var id = (key === "y" || event.shiftKey) ? "edit-redo" : "edit-undo";
        var button = document.getElementById(id);
        if (button && !button.disabled) {
            event.preventDefault();
            button.click();
        }
    });
})();
