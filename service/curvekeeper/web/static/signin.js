"use strict";
document.addEventListener("DOMContentLoaded", () => {
  const form = document.getElementById("signin");
  const msg = document.getElementById("signin-message");
  if (new URLSearchParams(location.search).has("signed_out")) {
    CK.say(msg, "The key was not accepted any more: sign in again.", "error");
  }
  form.addEventListener("submit", async (ev) => {
    ev.preventDefault();
    const input = document.getElementById("key");
    const k = input.value.trim();
    if (!k) return;
    CK.say(msg, "Checking the key …");
    try {
      await CK.api("GET", "/v1/channels?limit=1", undefined, { key: k });
    } catch (e) {
      const why = e.status === 401 ? "The service does not know this key."
        : e.status === 403 ? "This key may not read channels: the pages need a technician or admin key."
        : `The key could not be checked: ${e.message}`;
      CK.say(msg, why, "error");
      return;
    }
    CK.setKey(k);
    input.value = "";
    location.assign("/ui/fleet");
  });
});
