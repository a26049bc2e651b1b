-- JWT replay cache (jti values until their token expires).
CREATE TABLE jwt_replay (
  iss   TEXT NOT NULL,
  jti   TEXT NOT NULL,
  until TEXT NOT NULL,
  PRIMARY KEY (iss, jti)
);
