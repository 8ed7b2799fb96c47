FROM python:3.11-slim
WORKDIR /app
COPY pyproject.toml README.md alembic.ini ./
COPY service ./service
COPY migrations ./migrations
COPY seed_feed ./seed_feed
RUN pip install --no-cache-dir .
ENV TALLYWARD_DATABASE_URL=sqlite:////data/tallyward.db
VOLUME /data
EXPOSE 8000
# Migrates to head, then serves. For PostgreSQL set TALLYWARD_DATABASE_URL=postgresql+psycopg://...
CMD ["tallyward", "serve", "--host", "0.0.0.0", "--port", "8000", "--workers", "2"]
