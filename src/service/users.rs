//! The `Users` service.

use tonic::{Request, Response, Status};

use super::Daemon;
use crate::auth::{self, Role, User};
use crate::engine::Engine;
use crate::error::Error;
use crate::proto::v1::{
    AddUserRequest, AddUserResponse, ListUsersRequest, ListUsersResponse, RevokeUserRequest,
    RotateTokenRequest, UserInfo, WhoAmIRequest, users_server::Users,
};

fn info(u: User) -> UserInfo {
    UserInfo {
        name: u.name,
        roles: u.roles.iter().map(|r| r.to_string()).collect(),
        team: u.team,
        created_at: u.created_at,
        revoked: u.revoked,
    }
}

/// Runs `f` in the engine's one write path, with the engine's clock.
fn write<T>(
    engine: &mut Engine,
    f: impl FnOnce(&mut Engine, chrono::DateTime<chrono::Utc>) -> Result<T, Error>,
) -> Result<T, Error> {
    let now = engine.now();
    engine.write(|w| f(w, now))
}

#[tonic::async_trait]
impl Users for Daemon {
    async fn add_user(
        &self,
        request: Request<AddUserRequest>,
    ) -> Result<Response<AddUserResponse>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("adding users", &[Role::Organizer])?;
        let req = request.into_inner();
        let roles = req
            .roles
            .iter()
            .map(|r| r.parse::<Role>())
            .collect::<Result<Vec<_>, _>>()?;
        let (user, token) = self
            .db
            .call(move |engine| {
                write(engine, |tx, now| {
                    auth::add_user(tx, &req.name, &roles, Some(&req.team), &caller.name, now)
                })
            })
            .await?;
        Ok(Response::new(AddUserResponse {
            user: Some(info(user)),
            token,
        }))
    }

    async fn list_users(
        &self,
        request: Request<ListUsersRequest>,
    ) -> Result<Response<ListUsersResponse>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("listing users", &[Role::Organizer, Role::Auditor])?;
        let users = self
            .db
            .call(|engine| auth::list_users(engine.store().conn()))
            .await?;
        Ok(Response::new(ListUsersResponse {
            users: users.into_iter().map(info).collect(),
        }))
    }

    async fn revoke_user(
        &self,
        request: Request<RevokeUserRequest>,
    ) -> Result<Response<UserInfo>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("revoking users", &[Role::Organizer])?;
        let name = request.into_inner().name;
        let user = self
            .db
            .call(move |engine| {
                write(engine, |tx, now| {
                    auth::revoke_user(tx, &name, &caller.name, now)
                })
            })
            .await?;
        Ok(Response::new(info(user)))
    }

    async fn rotate_token(
        &self,
        request: Request<RotateTokenRequest>,
    ) -> Result<Response<AddUserResponse>, Status> {
        let caller = self.caller(&request).await?;
        let (user, token) = self
            .db
            .call(move |engine| {
                let token = write(engine, |tx, now| auth::rotate_token(tx, &caller.name, now))?;
                let user = auth::list_users(engine.store().conn())?
                    .into_iter()
                    .find(|u| u.name == caller.name)
                    .ok_or_else(|| Error::not_found("user", caller.name.clone()))?;
                Ok((user, token))
            })
            .await?;
        Ok(Response::new(AddUserResponse {
            user: Some(info(user)),
            token,
        }))
    }

    async fn who_am_i(
        &self,
        request: Request<WhoAmIRequest>,
    ) -> Result<Response<UserInfo>, Status> {
        let caller = self.caller(&request).await?;
        let name = caller.name.clone();
        let user = self
            .db
            .call(move |engine| {
                auth::list_users(engine.store().conn())?
                    .into_iter()
                    .find(|u| u.name == name)
                    .ok_or_else(|| Error::not_found("user", name.clone()))
            })
            .await?;
        Ok(Response::new(info(user)))
    }
}
