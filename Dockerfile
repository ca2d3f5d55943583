# One image for the API (`emberscore serve`) and the learner (`emberscore learn`).
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1

WORKDIR /app
COPY pyproject.toml README.md ./
COPY scoring ./scoring
COPY service ./service
RUN pip install . \
    && useradd --create-home --uid 10001 emberscore

USER emberscore
EXPOSE 8080

# Liveness of the API; the learner's compose service replaces it with a process check.
HEALTHCHECK --interval=10s --timeout=3s --start-period=10s --retries=3 \
    CMD ["python", "-c", "import sys, urllib.request; sys.exit(urllib.request.urlopen('http://127.0.0.1:8080/healthz', timeout=2).status != 200)"]

CMD ["emberscore", "serve", "--host", "0.0.0.0", "--port", "8080"]
