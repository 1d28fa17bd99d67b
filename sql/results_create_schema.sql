create schema if not exists {{ schema }}
