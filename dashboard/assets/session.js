// Warn before the page is left while some of the work would be lost:
// - a change the server has not yet confirmed keeping (the page counts its changes in
//   window.barrierflowEdits, the server answers with window.barrierflowSaved; see
//   dashboard/panels/session.py);
// - another tab's save is in conflict with this page (window.barrierflowConflict);
// - a text field holds typing not yet committed (Enter, Tab or leaving the field commits it);
// - typing was just committed and the page has not yet counted the change it makes (the
//   server answers the edit first; a commit that changes nothing stops counting after 3 s).
(function () {
    var typing = null;
    window.barrierflowCommitted = 0;
    function committed() {
        if (typing) { window.barrierflowCommitted = Date.now(); }
        typing = null;
    }
    document.addEventListener("input", function (event) {
        var el = event.target;
        if (el && el.tagName === "INPUT" && (el.type === "text" || el.type === "search" || !el.type)) {
            typing = el.type === "search" ? null : el;
        }
    }, true);
    document.addEventListener("change", committed, true);
    document.addEventListener("keydown", function (event) {
        if (event.key === "Enter" || event.key === "Tab") { committed(); }
    }, true);

    window.barrierflowUnsaved = function () {
        var edits = window.barrierflowEdits || 0;
        var saved = window.barrierflowSaved || 0;
        if (window.barrierflowConflict) { return "another tab's version conflicts with this page"; }
        if (edits > saved) { return "changes not yet kept on the server"; }
        if (typing && document.body.contains(typing)) { return "typing not yet committed"; }
        var since = Date.now() - (window.barrierflowCommitted || 0);
        if ((window.barrierflowCounted || 0) < window.barrierflowCommitted && since < 3000) {
            return "a committed change not yet counted";
        }
        return "";
    };

    window.addEventListener("beforeunload", function (event) {
        if (window.barrierflowUnsaved()) {
            event.preventDefault();
            event.returnValue = "";
            return "";
        }
    });
})();
