"""Opens the live page of `live_page_answer serve` (a full site) in headless
Chromium (Debian packages chromium and chromium-driver) through Selenium
and prints how long the page took to merge and draw each answer, ms (a
benchmark, not a test).

Usage: python live_page_bench.py URL SECONDS
"""

import json
import sys
import time

from live_page import chromium


def main(url, seconds):
    driver = chromium()
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
