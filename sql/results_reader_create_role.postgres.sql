-- A group role without login: dashboards log in as their own user, made a member of this role.
create role {{ role }} nologin
