// Upload status page: poll the progress view until the import has finished or failed.

const POLL_MS = 1000;

function cell(text, code = false) {
  const td = document.createElement("td");
  if (code) {
    const c = document.createElement("code");
    c.textContent = text;
    td.append(c);
  } else {
    td.textContent = text;
  }
  return td;
}

function show(root, status) {
  root.querySelector("#upload-state").textContent = status.state;
  root.querySelector("#upload-count").textContent = `${status.done} of ${status.total}`;
  const bar = root.querySelector("#upload-progress");
  bar.max = Math.max(status.total, 1);
  bar.value = status.done;
  const body = root.querySelector("#upload-outcomes tbody");
  body.replaceChildren(...(status.outcomes || []).map((o) => {
    const row = document.createElement("tr");
    row.append(cell(o.status), cell(o.source, true), cell(o.detail));
    return row;
  }));
  if (status.error && !root.querySelector(".form-errors")) {
    const box = document.createElement("div");
    box.className = "form-errors";
    box.setAttribute("role", "alert");
    box.textContent = status.error;
    bar.after(box);
  }
}

async function poll(root) {
  const response = await fetch(root.dataset.progressUrl, { credentials: "same-origin" });
  if (!response.ok) return;
  const status = await response.json();
  show(root, status);
  if (status.state !== "finished" && status.state !== "failed") {
    setTimeout(() => poll(root), POLL_MS);
  }
}

const root = document.getElementById("upload-status");
if (root) poll(root);
