package postgres_test

import (
	"context"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/migrations"
)

func migrationsApply(ctx context.Context, c *pgxpool.Conn) (int, error) {
	return migrations.ApplyConn(ctx, c.Conn(), nil)
}
