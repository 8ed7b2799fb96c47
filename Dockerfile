FROM python:3.11-slim
WORKDIR /app
COPY pyproject.toml README.md alembic.ini ./
COPY service ./service
COPY migrations ./migrations
# The product only: the demo tools' extra (httpx, matplotlib) is not installed, and the
# migrations ship inside the package (service/migrations). The service runs as an
# unprivileged user that owns only the data volume.
RUN pip install --no-cache-dir . \
    && groupadd --system --gid 10001 tallyward \
    && useradd --system --uid 10001 --gid 10001 --home-dir /app --no-create-home \
       --shell /usr/sbin/nologin tallyward \
    && mkdir -p /data \
    && chown 10001:10001 /data \
    && chmod 0700 /data
ENV TALLYWARD_DATABASE_URL=sqlite:////data/tallyward.db
VOLUME /data
EXPOSE 8000
USER 10001:10001
# Migrates to head, then serves. For PostgreSQL set TALLYWARD_DATABASE_URL=postgresql+psycopg://...
# Binding 0.0.0.0 needs TALLYWARD_AUTH=required (the default): loopback-open is refused.
CMD ["tallyward", "serve", "--host", "0.0.0.0", "--port", "8000", "--workers", "2"]
