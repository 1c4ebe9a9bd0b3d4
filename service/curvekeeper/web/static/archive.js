"use strict";
// An archived channel on its page: a banner saying so, with the unarchive action; the
// actions the channel would refuse (calibrate, roll back) are hidden while it is archived.
const ARCHIVE = (() => {
  function render(ch, reload) {
    const banner = document.getElementById("archived-banner");
    const archived = Boolean(ch.archived);
    document.body.classList.toggle("is-archived", archived);
    document.body.dataset.archived = String(archived);
    banner.hidden = !archived;
    if (!archived) return;
    document.getElementById("archived-since").textContent = CK.when(ch.archived_at);
    const button = document.getElementById("unarchive-button");
    const msg = document.getElementById("archive-message");
    button.onclick = async () => {
      button.disabled = true;
      const note = document.getElementById("unarchive-note").value.trim();
      try {
        await CK.api("POST", `/v1/channels/${encodeURIComponent(ch.id)}/unarchive`, note ? { note } : {});
        CK.say(msg, "");
        await reload();
      } catch (e) {
        CK.say(msg, `Could not unarchive the channel: ${e.message}`, "error");
      } finally {
        button.disabled = false;
      }
    };
  }
  return { render };
})();
