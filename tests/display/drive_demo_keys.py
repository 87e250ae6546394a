"""Drive `livequant demo` on a pseudo-terminal 100 columns wide and accept a proposal by keys.

    PYTHONPATH=. python tests/display/drive_demo_keys.py SESSION_DIR DURATION_S

Waits for proposal p0001 on the live panel, presses `a` (the panel shows the proposal,
its dose and the caution), then `y`; writes what the terminal showed (escape codes
removed) to SESSION_DIR.screen.txt.  The ledger then holds the decision with the note
"accepted at the live display".  A manual end-to-end check (one to three minutes).
"""
import fcntl, os, re, struct, subprocess, sys, termios, threading, time

CONFIG = os.path.join(os.path.dirname(os.path.abspath(sys.argv[1])),
                      "drive_demo_keys.toml")
with open(CONFIG, "w") as f:      # propose from one weak-dose frame, as tests/test_demo.py does
    f.write("[proposals]\nmin_score = 0.1\n")
master, slave = os.openpty()
fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 100, 0, 0))
env = dict(os.environ, COLUMNS="100", LINES="40", TERM="xterm-256color")
proc = subprocess.Popen([sys.executable, "-m", "livequant", "demo", "--session", sys.argv[1],
                         "--frames", "2", "--size", "768", "--duration-s", sys.argv[2],
                         "--cadence-s", "2", "--workers", "1", "--config", CONFIG,
                         "--no-report"],
                        stdin=slave, stdout=slave, stderr=slave, env=env, start_new_session=True)
os.close(slave)
buf = bytearray()
def reader():
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:
            return
        if not data:
            return
        buf.extend(data)
t = threading.Thread(target=reader, daemon=True); t.start()
def text():
    return re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", buf.decode("utf-8", "replace"))
t0 = time.time()
sent = False
while proc.poll() is None and time.time() - t0 < 600:
    time.sleep(1.0)
    if not sent and re.search(r"p0001\s+open", text()):
        os.write(master, b"a"); time.sleep(2.0)
        os.write(master, b"y"); sent = True
        print("keys sent at", round(time.time() - t0), "s", flush=True)
proc.wait(timeout=60)
time.sleep(0.5)
open(sys.argv[1] + ".screen.txt", "w").write(text())
print("exit", proc.returncode, "after", round(time.time() - t0), "s")
