# whirlwatch: the service, the dashboard and the command line in one image (docs/deploy.md).
#   docker build -t whirlwatch:local .
#   docker run --rm whirlwatch:local --help
# The entry point is the `whirlwatch` command; the default command runs the service. The
# compose file (compose.yaml) runs `db upgrade`, `run` and `dashboard --config` from it.
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1

# A system user without a login shell owns nothing but its data folder.
RUN groupadd --system --gid 10001 whirlwatch \
 && useradd --system --uid 10001 --gid whirlwatch --home-dir /var/lib/whirlwatch \
        --shell /usr/sbin/nologin --create-home whirlwatch

WORKDIR /opt/whirlwatch/src
COPY pyproject.toml README.md ./
COPY monitor ./monitor
COPY dashboard ./dashboard
# The package with the extras a site uses: PostgreSQL (psycopg) and the shared login-limit
# counts (redis). Then the sources go: only the installed package runs.
RUN pip install ".[postgres,redis]" \
 && cd / && rm -rf /opt/whirlwatch/src

# The default SQLite store and the compiled-kernel cache live in the data folder (the
# package's own folder is read-only for the service user).
ENV WHIRLWATCH_SERVICE_DATA_DIR=/var/lib/whirlwatch \
    NUMBA_CACHE_DIR=/var/lib/whirlwatch/.numba-cache
WORKDIR /var/lib/whirlwatch
USER whirlwatch:whirlwatch

# 8050: dashboard and JSON API; 9108: the service's /metrics, /healthz and /readyz.
EXPOSE 8050 9108
ENTRYPOINT ["whirlwatch"]
CMD ["run"]
