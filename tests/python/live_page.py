"""Opens the gateway's live page in headless Chromium (Debian packages
chromium and chromium-driver) through Selenium, as a control-room screen
would, and checks it.

Usage: python live_page.py URL SERIAL FIRST SECOND SCREENSHOT.png
Waits until the card of device SERIAL shows moisture FIRST (e.g. "14.37 %"),
prints {"event": "first"} and waits (up to 60 s) for SECOND without the
page being reloaded (a marker set in the page must survive), saves a
screenshot, waits 4.5 s (two more polls), compares the trends the page
holds (built from the points of each answer it had not had) with the
whole trends of /api/site, checks that the page draws a trend anew after
an answer of another gateway run (numbers from 1 again) and from a
gateway that numbers no points, and prints one JSON line with what it saw. Then it waits for a
line on stdin (the test stops the gateway's web server and says so) and
up to 30 s for the card to show no value, and prints what the card and the
banner say.
"""

import json
import sys
import time
import urllib.request

from PIL import Image
from selenium import webdriver
from selenium.webdriver.chrome.service import Service
from selenium.common.exceptions import StaleElementReferenceException
from selenium.webdriver.common.by import By


def moisture_text(driver, serial):
    # The page redraws a card when a reading arrives: an element found just
    # before a redraw is stale by the time its text is read (seen once in a
    # full test run); that is no value yet, and the next poll finds the new one.
    cards = driver.find_elements(By.CSS_SELECTOR, f'section.card[data-serial="{serial}"] [data-role="moisture"]')
    try:
        return cards[0].text if cards else None
    except StaleElementReferenceException:
        return None


def wait_for(driver, serial, text, limit):
    t0 = time.time()
    while time.time() - t0 < limit:
        got = moisture_text(driver, serial)
        if got is not None and got.startswith(text):
            return got
        time.sleep(0.1)
    raise SystemExit(f"after {limit} s the card of {serial} shows {moisture_text(driver, serial)!r}, not {text!r}")


def chromium():
    """Debian's headless Chromium through its chromedriver."""
    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
              "--disable-component-update", "--disable-sync", "--no-first-run", "--window-size=1920,1080"):
        opts.add_argument(a)
    return webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)


def main(url, serial, first, second, shot):
    driver = chromium()
    try:
        driver.get(url)
        wait_for(driver, serial, first, 60)
        driver.execute_script("window.__fringeMarker = 'same page';")
        print(json.dumps({"event": "first"}), flush=True)
        got = wait_for(driver, serial, second, 60)
        marker = driver.execute_script("return window.__fringeMarker || null;")
        title = driver.title
        cards = len(driver.find_elements(By.CSS_SELECTOR, "section.card"))
        flags = [e.text for e in driver.find_elements(By.CSS_SELECTOR, ".flags li")]
        # The page asks only for the trend points it has not had: after two
        # more polls with nothing new, what it holds is what the gateway has.
        time.sleep(4.5)
        held = driver.execute_script("return window.__fringeTrends();")
        # Each card's drawn trend ends at the last point the page holds (a
        # trend is drawn again only when its points change).
        drawn = driver.execute_script(
            "return Array.from(document.querySelectorAll('section.card')).map("
            "c => [c.dataset.serial, (c.querySelector('svg.trend') || {getAttribute: () => null}).getAttribute('data-last')]);")
        last = {k.split(" ", 1)[1]: (str(v[-1][4]) if v else "") for k, v in held["trends"].items()}
        # The page's own functions on two answers of two gateway runs whose
        # points carry the same numbers and other values (a gateway
        # restarted: numbers start at 1 again), and on a gateway that
        # numbers no points: each must be drawn anew. (Run in the page, on
        # a unit of its own; the page's next poll, of another run now, asks
        # for every trend whole.)
        redrawn = driver.execute_script(
            "const u = (v, n) => ({unit: 999, serial: 'restart-check', history_full: true, history_len: 2,"
            " history: [[1e12, v, 0.1, 0], [1e12 + 1e4, v, 0.1, 0]].map((p, i) => n ? p.concat([i + 1]) : p)});"
            "const draw = (epoch, v, n) => { const a = u(v, n); mergeTrends({epoch, mark: 3, units: [a]}); return trendOf(a); };"
            "const a = draw('run-a', 10, true), b = draw('run-b', 20, true);"
            "const c = draw(undefined, 30, false), d = draw(undefined, 40, false);"
            "return [a !== b, c !== d];")
        with urllib.request.urlopen(url + "api/site", timeout=10) as r:
            whole = json.load(r)
        gateway = {f"{u['unit']} {u['serial']}": u["history"] for u in whole["units"]}
        driver.save_screenshot(shot)
        img = Image.open(shot).convert("RGB")
        colours = len(img.resize((192, 108)).getcolors(maxcolors=1 << 16) or [])
        print(json.dumps({"event": "second", "text": got, "marker": marker, "title": title, "cards": cards,
                          "flags": flags, "width": img.width, "height": img.height, "colours": colours,
                          "trends_match": held["trends"] == gateway,
                          "trend_points": {k: len(v) for k, v in held["trends"].items()},
                          "asks_from_mark": held["since"] is not None,
                          "partial_answers": held["partialAnswers"],
                          "whole_asks": held["wholeAsks"],
                          "drawn_match": all(last.get(s) == d for s, d in drawn) and len(drawn) == len(last),
                          "redrawn_after_restart": redrawn[0], "redrawn_unnumbered": redrawn[1]}), flush=True)
        sys.stdin.readline()
        gone = wait_for(driver, serial, "no value", 30)
        banner = driver.find_element(By.ID, "silent")
        grey = len(driver.find_elements(By.CSS_SELECTOR, "section.card.none"))
        status = [e.text for e in driver.find_elements(By.CSS_SELECTOR, "ul.status li")]
        meta = len(driver.find_elements(By.CSS_SELECTOR, "section.card .meta"))
        print(json.dumps({"event": "gone", "text": gone, "banner": banner.text if banner.is_displayed() else None,
                          "grey_cards": grey, "status": status, "meta": meta}), flush=True)
    finally:
        driver.quit()


if __name__ == "__main__":
    main(*sys.argv[1:6])
