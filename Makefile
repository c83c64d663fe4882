# thresher: two commands do all the set-up.
#   make demo   creates .venv if missing, installs what running needs, runs the default flow on sample_inputs/
#   make test   creates .venv if missing, installs with the test extras, runs the whole suite

PYTHON ?= $(shell command -v python3.11 2>/dev/null || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.thresher-installed
# The test extras (an S3 emulator, reference libraries, the demo drive's PDF writer...)
# only for the targets that need them: `make demo` installs what running needs.
TEST_STAMP := $(VENV)/.thresher-test-installed

# Debian packages the tests read as outside references: PDFs and HTML manuals that
# Debian ships, poppler's pdftotext/pdfinfo (the reference PDF extractor), the Unicode
# Character Database (NormalizationTest.txt), translated manual pages, and Chromium
# (headless) to render the review page; LibreOffice Calc and Impress and the office
# files of python-odf-doc, debian-policy and developers-reference (ODF, EPUB) for the
# office-format readers' tests; PostgreSQL for the delivery target's tests; PDFs with
# ruled tables (debian-policy's FHS, zlib1g-dev's CRC paper, the Debian FAQ) for the
# table grid against pdfplumber; Python's test suite for its real archives and e-mail messages; acl (setfacl/getfacl) for the access tests.
DEBIAN_TEST_PACKAGES := poppler-utils shared-mime-info libtasn1-doc libffi-dev \
                        bzip2-doc fontconfig libxslt1-dev locales \
                        unicode-data manpages manpages-de manpages-fr manpages-es \
                        tesseract-ocr tesseract-ocr-eng libreoffice-writer-nogui \
                        libreoffice-calc-nogui libreoffice-impress-nogui \
                        python-odf-doc debian-policy developers-reference fonts-dejavu-core \
                        chromium postgresql zlib1g-dev debian-faq libpython3.11-testsuite acl

# Manuals Debian ships as both PDF and HTML: the retrieval benchmark (bench/retrieval.py)
# takes its questions from the HTML edition and ranks chunks of the PDF edition.
BENCH_PACKAGES := debian-faq developers-reference debian-policy
# The installation guide's PDF is one of the ruled-table PDFs of bench extract and goals.
BENCH_PACKAGES += installation-guide-amd64
# The FAQ's PDF (contents and index pages against its outline) is also a test reference.
DEBIAN_TEST_PACKAGES += debian-faq
# Reference cards in many scripts (one with a mis-mapped text layer) and Tesseract's
# Hindi data to read that card's page: tests/test_extract_text_layer.py.
DEBIAN_TEST_PACKAGES += debian-refcard tesseract-ocr-hin
# A UTF-8 decoder stress-test file (SDL's copy of Markus Kuhn's) for stray control
# bytes in text: tests/test_extract_text.py.
DEBIAN_TEST_PACKAGES += libsdl2-tests

# Optional OCR of scanned PDF pages (extract: ocr: true): Tesseract and its English data.
OCR_PACKAGES := tesseract-ocr tesseract-ocr-eng

.PHONY: demo test bench bytecode bench-deps sample clean-store help system-deps ocr fuzz prefect-server prefect-server-stop

help:
	@echo "make demo    run the default flow on sample_inputs/ (store in .thresher-store/)"
	@echo "make test    run the test suite"
	@echo "make bench   run the benchmarks, the throughput goals table first (prints measured ratios)"
	@echo "make fuzz    extraction of thousands of damaged files (make test runs a few hundred)"
	@echo "make sample  regenerate sample_inputs/ from tools/make_sample_drive.py"
	@echo "make ocr     install Tesseract for scanned PDF pages (extract: ocr: true)"
	@echo "make office  install LibreOffice to read legacy .doc and .ppt files"
	@echo "make prefect-server       start a Prefect server in the background (its UI too), for fast runs"
	@echo "make prefect-server-stop  stop it"
	@echo "make bytecode  compile thresher's own modules (demo, test, bench and prefect-server do it)"

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

# Reinstall when the project's metadata changes.
$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	@touch $@

$(TEST_STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	@touch $@ $(STAMP)

# thresher's own modules compiled to byte-code beside them (__pycache__/, ignored by git).
# The install is editable, so nothing else compiles them, and where PYTHONDONTWRITEBYTECODE
# is set (as in many container images) Python compiles them again at every start: 0.3 s
# of each run's start and of each fork server's on this machine (DEVELOPERS.md, "Prefect
# in embedded mode"). Cheap when nothing changed (about 0.05 s).
bytecode: | $(BIN)/python
	@PYTHONDONTWRITEBYTECODE= $(BIN)/python -m compileall -q flows steps > /dev/null

demo: $(STAMP) bytecode
	$(BIN)/python tools/sample_times.py sample_inputs
	$(BIN)/thresher run --probes config/demo-probes.yaml
	@echo
	$(BIN)/thresher status
	@echo
	@echo "next: $(BIN)/thresher trail operations/branch-operations-handbook.pdf"

test: $(TEST_STAMP) system-deps bytecode
	$(BIN)/python -m pytest

# Installs only what is missing; needs root (as on CI) or sudo.
system-deps:
	@$(MAKE) --no-print-directory apt-install PACKAGES="$(DEBIAN_TEST_PACKAGES)"

ocr: $(STAMP)
	@$(MAKE) --no-print-directory apt-install PACKAGES="$(OCR_PACKAGES)"
	$(BIN)/python -m pip install --quiet -e '.[ocr]'

office:
	@$(MAKE) --no-print-directory apt-install PACKAGES="$(OFFICE_PACKAGES)"

apt-install:
	@missing=""; for p in $(PACKAGES); do \
	  dpkg-query -W -f='$${Status}' $$p 2>/dev/null | grep -q "install ok installed" || missing="$$missing $$p"; \
	done; \
	if [ -n "$$missing" ]; then \
	  echo "installing Debian packages:$$missing"; \
	  SUDO=""; [ "$$(id -u)" = 0 ] || SUDO=sudo; \
	  $$SUDO apt-get update -qq && $$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends $$missing; \
	fi

bench: $(TEST_STAMP) bench-deps bytecode
	$(BIN)/python -m bench

bench-deps:
	@$(MAKE) --no-print-directory apt-install PACKAGES="$(BENCH_PACKAGES)"

# Long fuzzing of extraction; THRESHER_FUZZ_SEED picks another sequence of mutations.
fuzz: $(TEST_STAMP)
	THRESHER_FUZZ_CASES=$${THRESHER_FUZZ_CASES:-5000} $(BIN)/python -m pytest -q tests/test_fuzz.py

sample: $(TEST_STAMP)
	$(BIN)/python tools/make_sample_drive.py

# A Prefect server that outlives the runs: without one, every run starts a temporary
# server (10-20 s on 2 cores). It listens on 127.0.0.1 only, keeps its database in
# .prefect-server/, and shows the runs in its UI. Point runs at it with PREFECT_API_URL.
PREFECT_SERVER_PORT ?= 4200
PREFECT_SERVER_HOME := $(CURDIR)/.prefect-server
prefect-server: $(STAMP) bytecode
	@mkdir -p $(PREFECT_SERVER_HOME)
	PREFECT_HOME=$(PREFECT_SERVER_HOME) DO_NOT_TRACK=1 PREFECT_SERVER_ANALYTICS_ENABLED=false \
	  $(BIN)/prefect server start --host 127.0.0.1 --port $(PREFECT_SERVER_PORT) --background
	@# --background returns before the server answers; a run started at once would fail.
	@$(BIN)/python tools/wait_for_prefect.py http://127.0.0.1:$(PREFECT_SERVER_PORT)/api
	@echo
	@echo "runs use it when PREFECT_API_URL is set:"
	@echo "  export PREFECT_API_URL=http://127.0.0.1:$(PREFECT_SERVER_PORT)/api"
	@echo "its UI: http://127.0.0.1:$(PREFECT_SERVER_PORT)   stop it: make prefect-server-stop"

prefect-server-stop: $(STAMP)
	PREFECT_HOME=$(PREFECT_SERVER_HOME) $(BIN)/prefect server stop

clean-store:
	rm -rf .thresher-store
