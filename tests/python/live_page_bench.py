"""Opens the live page of `live_page_serve` (a full site) in headless
Chromium (Debian packages chromium and chromium-driver) through Selenium
and prints how long the page took to merge and draw each answer, ms (a
benchmark, not a test).

Usage: python live_page_bench.py URL SECONDS
"""

import json
import sys
import time

from selenium import webdriver
from selenium.webdriver.chrome.service import Service


def main(url, seconds):
    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
              "--disable-component-update", "--disable-sync", "--no-first-run", "--window-size=1920,1080"):
        opts.add_argument(a)
    driver = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)
    try:
        driver.get(url)
        time.sleep(float(seconds))
        got = driver.execute_script("return window.__fringeTrends();")
        print(json.dumps({"draw_ms": [round(x, 1) for x in got["drawMs"]],
                          "whole_asks": got["wholeAsks"], "partial_answers": got["partialAnswers"]}))
    finally:
        driver.quit()


if __name__ == "__main__":
    main(*sys.argv[1:3])
